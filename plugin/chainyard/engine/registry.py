"""The sampler-kind registry: everything the rest of chainyard needs to know about a kind.

Each kind lives in one module that ends by calling :func:`register` with a
:class:`SamplerKind`: its config name, the identity string recorded in the store, the word
for its parallel sequences ("walkers" or "chains"), whether its draws are independent (no
burn-in, no autocorrelation), the blobs the engine itself stores, how to build its first
random-state record and its driver, and how to check a stored random-state record. The run
loop, store creation, replay, verification and the diagnostics ask :func:`sampler_kind`;
none of them names a kind.

The four built-in kinds are imported on first use (so that asking about one kind does not
import another kind's dependencies); any other module may register a kind of its own.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import numpy as np
    from numpy.typing import NDArray

    from chainyard.config import RunConfig
    from chainyard.engine.protocol import SamplerDriver
    from chainyard.model import LoadedModel

__all__ = ["SamplerKind", "kind_names", "kind_of_identity", "register", "sampler_kind"]

#: the built-in kinds and the modules that register them (imported on first use)
_BUILT_IN: dict[str, str] = {
    "ensemble": "chainyard.engine.ensemble",
    "metropolis_hastings": "chainyard.engine.metropolis",
    "kernel": "chainyard.engine.kernel",
    "accept_reject": "chainyard.engine.accept_reject",
}

DriverFactory = Callable[
    [
        "RunConfig",
        "LoadedModel",
        "NDArray[np.float64]",
        "NDArray[np.float64]",
        "NDArray[np.float64]",
        "dict[str, Any]",
        int,
    ],
    "SamplerDriver",
]


@dataclass(frozen=True)
class SamplerKind:
    """What one sampler kind is.

    Attributes
    ----------
    name : str
        The config's ``sampler.kind`` (e.g. ``"metropolis_hastings"``).
    identity : str
        The driver's identity string, recorded in the store (e.g. ``"emcee.ensemble"``).
    axis : str
        What its parallel sequences are called: ``"walkers"`` (one ensemble) or ``"chains"``
        (independent chains).
    independent_draws : bool
        True if every draw is exact and independent of the others (no burn-in to discard,
        no autocorrelation to estimate).
    engine_blobs : tuple of str
        Per-step values the engine stores beside the model's blobs.
    initial_random_state : callable
        ``(config, replica) -> dict``: the driver's random-state record before its first
        step, as JSON values.
    make_driver : callable
        ``(config, model, position, log_prob, blobs, random_state, step) -> SamplerDriver``:
        the driver continuing from a stored state (``position`` (walkers, params),
        ``log_prob`` (walkers,), ``blobs`` (walkers, model blobs + engine blobs)).
    check_random_state : callable
        ``(record) -> None``: raise ValueError if a stored random-state record is malformed.
    preflight : callable
        ``(config) -> str | None``: checks made before anything is written (a user kernel
        is imported, so a missing one is refused at once); returns a note for
        ``chainyard check`` or None.
    """

    name: str
    identity: str
    axis: str
    independent_draws: bool
    engine_blobs: tuple[str, ...]
    initial_random_state: Callable[[RunConfig, int], dict[str, Any]]
    make_driver: DriverFactory
    check_random_state: Callable[[Any], None]
    preflight: Callable[[RunConfig], str | None] = lambda config: None


_KINDS: dict[str, SamplerKind] = {}


def register(kind: SamplerKind) -> SamplerKind:
    """Add ``kind`` to the registry (the same declaration twice is allowed; a clash is not).

    Raises
    ------
    ValueError
        If another declaration already holds ``kind.name`` or ``kind.identity``.
    """
    if kind.axis not in ("walkers", "chains"):
        raise ValueError(f"sampler kind {kind.name!r}: axis must be 'walkers' or 'chains'")
    held = _KINDS.get(kind.name)
    if held is not None and held != kind:
        raise ValueError(f"sampler kind {kind.name!r} is already registered")
    if any(k.identity == kind.identity and k.name != kind.name for k in _KINDS.values()):
        raise ValueError(f"sampler identity {kind.identity!r} is already registered")
    _KINDS[kind.name] = kind
    return kind


def sampler_kind(name: str) -> SamplerKind:
    """The declaration of kind ``name`` (a built-in kind is imported on first use).

    Raises
    ------
    KeyError
        If no module has registered ``name``.
    """
    if name not in _KINDS and name in _BUILT_IN:
        from chainyard.workflow.imports import import_emcee_without_kde

        import_emcee_without_kde()  # a reader asking about a kind need not pay for scipy.stats
        importlib.import_module(_BUILT_IN[name])
    try:
        return _KINDS[name]
    except KeyError:
        known = ", ".join(kind_names())
        raise KeyError(f"unknown sampler kind {name!r}; known: {known}") from None


def kind_names() -> tuple[str, ...]:
    """Every kind known without importing anything: the built-in ones, then the registered."""
    return (*_BUILT_IN, *(k for k in _KINDS if k not in _BUILT_IN))


def kind_of_identity(identity: str) -> SamplerKind | None:
    """The kind whose stored identity string is ``identity`` (None if none is known)."""
    for name in kind_names():
        kind = sampler_kind(name)
        if kind.identity == identity:
            return kind
    return None
