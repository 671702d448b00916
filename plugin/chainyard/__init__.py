"""chainyard: reproducible, resumable MCMC sampling steps for data pipelines.

Public API
----------
load_config(path) -> RunConfig
sample(config, store_path, replica=0) -> Store
open_store(path) -> Store            (a store directory or a packed .zip)
verify(target) -> VerifyReport      (chunks, counters, seal, provenance chain)
replay(target, steps) -> ReplayResult
provenance_record(target) -> dict   (format chainyard.provenance v1)
pack_store(store, out) / unpack_store(pack, out)
prov_json(record) -> str            (W3C PROV-JSON)
to_datatree(stores, ...) -> DataTree (ArviZ data model; see chainyard.analysis.export)
"""

from __future__ import annotations

import importlib
from pathlib import Path
from typing import TYPE_CHECKING, Any

from chainyard.errors import (
    ChainyardError,
    ConfigError,
    ModelError,
    StoreConflictError,
    StoreError,
    StoreLockedError,
    VerificationError,
)

if TYPE_CHECKING:  # pragma: no cover
    from chainyard.analysis.export import to_datatree
    from chainyard.config import RunConfig, json_schema, load_config, parse_config
    from chainyard.engine import sample
    from chainyard.provenance.pack import pack_store, unpack_store
    from chainyard.provenance.prov_json import prov_json
    from chainyard.provenance.record import provenance_record
    from chainyard.provenance.replay import replay
    from chainyard.provenance.verify import verify
    from chainyard.store import Store

# The public names are imported on first use (PEP 562): a process that needs only part of
# the package (the commit helper process, `chainyard schema`) does not pay for emcee, scipy
# and pydantic at start-up.
_LAZY = {
    "RunConfig": "chainyard.config",
    "json_schema": "chainyard.config",
    "load_config": "chainyard.config",
    "parse_config": "chainyard.config",
    "sample": "chainyard.engine.run",
    "pack_store": "chainyard.provenance.pack",
    "unpack_store": "chainyard.provenance.pack",
    "prov_json": "chainyard.provenance.prov_json",
    "provenance_record": "chainyard.provenance.record",
    "replay": "chainyard.provenance.replay",
    "verify": "chainyard.provenance.verify",
    "Store": "chainyard.store",
    "to_datatree": "chainyard.analysis.export",
}


def _version() -> str:
    """The installed distribution's version (importlib.metadata costs ~0.1 s: asked on use)."""
    from importlib import metadata

    try:
        return metadata.version("chainyard")
    except metadata.PackageNotFoundError:  # running from a source tree
        return "0+unknown"


def __getattr__(name: str) -> Any:
    if name == "__version__":
        globals()[name] = value = _version()
        return value
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'chainyard' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY) | {"__version__"})


def open_store(path: str | Path) -> Store:
    """Open a chainyard store for reading (never executes code from it).

    ``path`` is a store directory or a single-file pack written by :func:`pack_store`.
    """
    from chainyard.store import Store

    return Store.open(path)


__all__ = [
    "ChainyardError",
    "ConfigError",
    "ModelError",
    "RunConfig",
    "Store",
    "StoreConflictError",
    "StoreError",
    "StoreLockedError",
    "VerificationError",
    "__version__",
    "json_schema",
    "load_config",
    "open_store",
    "pack_store",
    "parse_config",
    "prov_json",
    "provenance_record",
    "replay",
    "sample",
    "to_datatree",
    "unpack_store",
    "verify",
]
