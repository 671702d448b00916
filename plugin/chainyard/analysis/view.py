"""A read-only window on a store's committed steps (burn-in dropped without copying)."""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.store import Store

__all__ = ["StoreWindow"]


class StoreWindow:
    """Steps ``[start, store.steps_done)`` of ``store`` with the reading API of a store.

    Used where a decision is needed in-process (e.g. while running until targets) and a
    derived store on disk would be wasted work.
    """

    def __init__(self, store: Store, start: int) -> None:
        if not 0 <= start < store.steps_done:
            raise ValueError(f"window start {start} outside [0, {store.steps_done})")
        self._store, self._start = store, start
        self.path = store.path
        self.param_names = store.param_names
        self.blob_names = store.blob_names
        self.walkers = store.walkers
        self.replica = store.replica

    @property
    def steps_done(self) -> int:
        """Steps inside the window."""
        return self._store.steps_done - self._start

    @property
    def chunk_steps(self) -> int:
        """Steps per stored chunk of the underlying store."""
        return self._store.chunk_steps

    @property
    def config(self) -> Any:
        """The run configuration of the underlying store."""
        return self._store.config

    def _span(self, start: int, stop: int | None) -> tuple[int, int]:
        a, b, _ = slice(start, stop).indices(self.steps_done)
        return self._start + a, self._start + max(a, b)

    def column(
        self, param: int | str, start: int = 0, stop: int | None = None
    ) -> NDArray[np.float64]:
        """One parameter, shape (steps, walkers)."""
        return self._store.column(param, *self._span(start, stop))

    def log_prob(self, start: int = 0, stop: int | None = None) -> NDArray[np.float64]:
        """Log-probabilities, shape (steps, walkers)."""
        return self._store.log_prob(*self._span(start, stop))

    def accepted(self, start: int = 0, stop: int | None = None) -> NDArray[np.bool_]:
        """Acceptance flags, shape (steps, walkers)."""
        return self._store.accepted(*self._span(start, stop))

    def draws(self, start: int = 0, stop: int | None = None) -> NDArray[np.float64]:
        """Positions, shape (steps, walkers, params)."""
        return self._store.draws(*self._span(start, stop))
