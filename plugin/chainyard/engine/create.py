"""A new store for a run: its attributes (identity, provenance) and its start state.

The initial positions and their log-probabilities are the store's start; the engine's own
blobs start at zero, and the first commit record holds the replica's first RNG state.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from chainyard.config import RunConfig, config_hash
from chainyard.engine.drivers import engine_blob_names, initial_random_state, store_blob_names
from chainyard.engine.initial import initial_state
from chainyard.facts import git_state, host_record, software_versions, utc_now
from chainyard.model import LoadedModel
from chainyard.store import Store
from chainyard.store.layout import BLOB, LOG_PROB, POSITION
from chainyard.streams import spawn_key

__all__: list[str] = []


def _store_attrs(config: RunConfig, replica: int, identity: dict[str, Any]) -> dict[str, Any]:
    norm = config.normalised()
    return {
        "param_names": list(config.param_names),
        "blob_names": list(store_blob_names(config)),
        "walkers": config.sampler.walkers,
        "sampler_kind": config.sampler.kind,
        "replica": replica,
        "seed": config.seed,
        "spawn_key": list(spawn_key(replica, 1)),
        "config": norm,
        "config_hash": config_hash(norm),
        "config_dir": str(config.base_dir),
        "config_source": config.source,
        "identity": identity,
        "provenance": {
            "created_utc": utc_now(),
            "software": software_versions(),
            "host": host_record(),
            "git": git_state(config.base_dir),
        },
    }


def _create(
    config: RunConfig, model: LoadedModel, replica: int, identity: dict[str, Any], path: Path
) -> Store:
    pos, lp, blobs, _ = initial_state(config, model, replica)
    start = {POSITION: pos, LOG_PROB: lp}
    for k, b in enumerate(config.sampler.blobs):
        start[f"{BLOB}/{b}"] = blobs[:, k]
    for b in engine_blob_names(config):
        start[f"{BLOB}/{b}"] = np.zeros(config.sampler.walkers)  # nothing drawn yet
    st = config.storage
    record = {
        "format_version": 1,
        "steps_done": 0,
        "random_state": initial_random_state(config, replica),
        "checksums": {},
        "segments": [],
        "updated_utc": utc_now(),
    }
    path.parent.mkdir(parents=True, exist_ok=True)
    return Store.create(
        path,
        attrs=_store_attrs(config, replica, identity),
        walkers=config.sampler.walkers,
        n_params=len(config.parameters),
        blob_names=store_blob_names(config),
        capacity=config.sampler.steps,
        chunk_steps=st.chunk_steps,
        codec=st.codec,
        level=st.level,
        start=start,
        commit=record,
        fsync=st.fsync,
    )
