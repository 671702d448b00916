"""Sampling engines: the sampler protocol, the emcee ensemble driver and the run loop.

Names are imported on first use, so that importing one engine module (the commit helper
process imports :mod:`chainyard.engine.commit`) does not import emcee.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # pragma: no cover
    from chainyard.engine.ensemble import EnsembleDriver
    from chainyard.engine.protocol import SamplerDriver, StepRows
    from chainyard.engine.run import Interrupted, sample

_LAZY = {
    "EnsembleDriver": "chainyard.engine.ensemble",
    "SamplerDriver": "chainyard.engine.protocol",
    "StepRows": "chainyard.engine.protocol",
    "Interrupted": "chainyard.engine.run",
    "sample": "chainyard.engine.run",
}


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'chainyard.engine' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


__all__ = ["EnsembleDriver", "Interrupted", "SamplerDriver", "StepRows", "sample"]
