"""Which driver a run uses: a lookup of the config's ``sampler.kind`` in the registry.

The run loop, the store creation, replay and verification ask this module for the driver,
its identity string, its first random-state record and the blobs the engine itself stores;
each kind declares these in its own module (:mod:`chainyard.engine.registry`).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.config import RunConfig
from chainyard.engine.protocol import SamplerDriver
from chainyard.engine.registry import sampler_kind
from chainyard.model import LoadedModel
from chainyard.streams import random_state_from_json

__all__ = [
    "check_random_state",
    "driver_kind",
    "engine_blob_names",
    "initial_random_state",
    "make_driver",
    "store_blob_names",
    "stored_layout",
]


def driver_kind(config: RunConfig) -> str:
    """The driver's identity string for ``config`` (e.g. ``"emcee.ensemble"``)."""
    return sampler_kind(config.sampler.kind).identity


def engine_blob_names(config: RunConfig) -> tuple[str, ...]:
    """Per-step values the engine stores beside the model's blobs (accept-reject: the
    number of proposals each draw took)."""
    return sampler_kind(config.sampler.kind).engine_blobs


def store_blob_names(config: RunConfig) -> tuple[str, ...]:
    """Every blob array of the store: the model's, then the engine's."""
    return tuple(config.sampler.blobs) + engine_blob_names(config)


def initial_random_state(config: RunConfig, replica: int) -> dict[str, Any]:
    """The driver's random-state record before its first step, as JSON."""
    return sampler_kind(config.sampler.kind).initial_random_state(config, replica)


def stored_layout(sampler: dict[str, Any]) -> dict[str, Any]:
    """What a stored (normalised) sampler mapping implies for the store's attributes:
    ``walkers`` (chains for the chain kinds), ``blob_names`` (engine blobs included) and
    ``moves`` (empty for the chain kinds). A kind nobody registered (a foreign or damaged
    store) implies no engine blobs and no moves, so that the store's own attributes are
    compared and reported, not trusted."""
    name = sampler.get("kind", "ensemble")
    try:
        kind = sampler_kind(name) if isinstance(name, str) else None
    except KeyError:
        kind = None
    walkers_axis = kind is not None and kind.axis == "walkers"
    return {
        "walkers": sampler.get("walkers", sampler.get("chains")),
        "blob_names": list(sampler.get("blobs") or []) + list(kind.engine_blobs if kind else ()),
        "moves": sampler.get("moves") if walkers_axis else sampler.get("moves", []),
    }


def check_random_state(record: Any) -> None:
    """Raise ValueError if a stored random-state record is malformed (any kind)."""
    name = record.get("sampler") if isinstance(record, dict) else None
    if isinstance(name, str):
        try:
            kind = sampler_kind(name)
        except KeyError:
            kind = None
        if kind is not None:
            kind.check_random_state(record)
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
    kind = sampler_kind(config.sampler.kind)
    return kind.make_driver(config, model, position, log_prob, blobs, random_state, step)
