"""Which driver a run uses: built from the config's ``sampler.kind`` alone.

The run loop, the store creation and replay ask this module for the driver, its identity
string, its first random-state record and the blobs the engine itself stores, so they stay
the same for every sampler kind.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.config import (
    AcceptRejectSpec,
    KernelSpec,
    MetropolisSpec,
    RunConfig,
)
from chainyard.engine.protocol import SamplerDriver
from chainyard.model import LoadedModel
from chainyard.streams import random_state_from_json, random_state_to_json, sampler_random_state

__all__ = [
    "check_random_state",
    "driver_kind",
    "engine_blob_names",
    "initial_random_state",
    "make_driver",
    "store_blob_names",
    "stored_layout",
]

#: identity string of every kind's driver (recorded in the store identity)
DRIVER_KINDS = {
    "ensemble": "emcee.ensemble",
    "metropolis_hastings": "chainyard.metropolis_hastings",
    "kernel": "chainyard.kernel",
    "accept_reject": "chainyard.accept_reject",
}


def driver_kind(config: RunConfig) -> str:
    """The driver's identity string for ``config`` (e.g. ``"emcee.ensemble"``)."""
    return DRIVER_KINDS[config.sampler.kind]


def engine_blob_names(config: RunConfig) -> tuple[str, ...]:
    """Per-step values the engine stores beside the model's blobs (accept-reject: the
    number of proposals each draw took)."""
    if isinstance(config.sampler, AcceptRejectSpec):
        from chainyard.engine.accept_reject import PROPOSALS_BLOB

        return (PROPOSALS_BLOB,)
    return ()


def store_blob_names(config: RunConfig) -> tuple[str, ...]:
    """Every blob array of the store: the model's, then the engine's."""
    return tuple(config.sampler.blobs) + engine_blob_names(config)


def initial_random_state(config: RunConfig, replica: int) -> dict[str, Any]:
    """The driver's random-state record before its first step, as JSON."""
    spec = config.sampler
    if isinstance(spec, MetropolisSpec):
        from chainyard.engine.metropolis import initial_metropolis_state

        return initial_metropolis_state(spec, config.seed, replica)
    if isinstance(spec, KernelSpec):
        from chainyard.engine.kernel import initial_kernel_state

        return initial_kernel_state(spec, config.seed, replica)
    if isinstance(spec, AcceptRejectSpec):
        from chainyard.engine.accept_reject import initial_accept_reject_state

        return initial_accept_reject_state(spec, config.seed, replica)
    return random_state_to_json(sampler_random_state(config.seed, replica).get_state())


def stored_layout(sampler: dict[str, Any]) -> dict[str, Any]:
    """What a stored (normalised) sampler mapping implies for the store's attributes:
    ``walkers`` (chains for the chain kinds), ``blob_names`` (engine blobs included) and
    ``moves`` (empty for the chain kinds)."""
    kind = sampler.get("kind", "ensemble")
    extra = []
    if kind == "accept_reject":
        from chainyard.engine.accept_reject import PROPOSALS_BLOB

        extra = [PROPOSALS_BLOB]
    return {
        "walkers": sampler.get("walkers", sampler.get("chains")),
        "blob_names": list(sampler.get("blobs") or []) + extra,
        "moves": sampler.get("moves", []) if kind != "ensemble" else sampler.get("moves"),
    }


def check_random_state(record: Any) -> None:
    """Raise ValueError if a stored random-state record is malformed (any kind)."""
    if isinstance(record, dict) and record.get("sampler") in DRIVER_KINDS:
        from chainyard.engine.chains import generator_from_json

        chains = record.get("chains")
        if not isinstance(chains, list) or not chains:
            raise ValueError("malformed chain random states: expected a list")
        for item in chains:
            generator_from_json(item.get("block_start", item) if isinstance(item, dict) else None)
        return
    random_state_from_json(record or {})


def make_driver(
    config: RunConfig,
    model: LoadedModel,
    position: NDArray[np.float64],
    log_prob: NDArray[np.float64],
    blobs: NDArray[np.float64],
    random_state: dict[str, Any],
    *,
    step: int,
) -> SamplerDriver:
    """The driver of ``config.sampler.kind``, continuing from a stored state.

    Parameters
    ----------
    position : ndarray, shape (walkers, params)
    log_prob : ndarray, shape (walkers,)
    blobs : ndarray, shape (walkers, n_store_blobs)
        The state after the last stored step (the store's blobs, engine blobs included).
    random_state : dict
        The driver's record (:func:`initial_random_state` or the last commit's).
    step : int
        Steps already stored (0 for a fresh run).
    """
    spec = config.sampler
    n_model = len(spec.blobs)
    if isinstance(spec, MetropolisSpec):
        from chainyard.engine.metropolis import MetropolisDriver

        return MetropolisDriver(
            model, spec, position, log_prob, blobs[:, :n_model], random_state, step
        )
    if isinstance(spec, KernelSpec):
        from chainyard.engine.kernel import KernelDriver, load_kernel

        return KernelDriver(
            model, load_kernel(config), spec, position, log_prob, random_state, step
        )
    if isinstance(spec, AcceptRejectSpec):
        from chainyard.engine.accept_reject import AcceptRejectDriver

        return AcceptRejectDriver(model, spec, random_state, position.shape[0])
    from chainyard.engine.ensemble import EnsembleDriver

    return EnsembleDriver(
        model, spec.moves, position, log_prob, blobs, random_state, check_start=(step == 0)
    )
