"""A run's replica stores, checked to belong together."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from chainyard.errors import StoreError
from chainyard.store import Store

__all__ = ["open_replicas"]


def open_replicas(paths: Sequence[str | Path]) -> list[Store]:
    """Open the replica stores of one run.

    Raises
    ------
    StoreError
        If there are none, or they differ in parameters or walkers, or a replica repeats.
    """
    if not paths:
        raise StoreError("no stores given")
    stores = [Store.open(p) for p in paths]
    first = stores[0]
    seen: dict[int, Path] = {}
    for s in stores:
        if s.param_names != first.param_names or s.walkers != first.walkers:
            raise StoreError(
                f"{s.path}: parameters/walkers differ from {first.path}; "
                "replicas of one run must share them"
            )
        if s.steps_done == 0:
            raise StoreError(f"{s.path}: no committed steps")
        if s.replica in seen:
            raise StoreError(f"{s.path}: replica {s.replica} given twice (also {seen[s.replica]})")
        seen[s.replica] = s.path
    return stores
