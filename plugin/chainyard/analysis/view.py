"""A read-only window on a store's committed steps (burn-in dropped without copying)."""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.store import Store

__all__ = ["StoreWindow"]


class StoreWindow:
    """Steps ``start, start + factor, ...`` below ``stop`` of ``store``, with the reading API
    of a store: a selection (burn-in dropped, thinned, cut to the first ``stop`` steps)
    without copying.

    Used where a decision is needed in-process (e.g. while running until targets), and by
    the workflow steps, which read a run's draws through its recorded selection instead of
    derived copies.

    Parameters
    ----------
    store : Store
        The source store (read only).
    start : int
        First source step in the window.
    stop : int, optional
        Source steps from ``stop`` on are outside (default: every committed step).
    factor : int
        Keep every ``factor``-th step from ``start`` (thinning; 1 keeps all).
    """

    def __init__(self, store: Store, start: int, stop: int | None = None, factor: int = 1) -> None:
        end = store.steps_done if stop is None else min(int(stop), store.steps_done)
        if not 0 <= start < end:
            raise ValueError(f"window start {start} outside [0, {end})")
        if factor < 1:
            raise ValueError(f"window step {factor} must be >= 1")
        self._store, self._start, self._stop, self._factor = store, start, end, int(factor)
        self.source = store  # the underlying store (provenance stamps name it)
        self.path = store.path
        self.param_names = store.param_names
        self.blob_names = store.blob_names
        self.walkers = store.walkers
        self.replica = store.replica

    @property
    def steps_done(self) -> int:
        """Steps inside the window."""
        return len(range(self._start, self._stop, self._factor))

    @property
    def chunk_steps(self) -> int:
        """Window steps per stored chunk of the underlying store (at least 1)."""
        return max(1, self._store.chunk_steps // self._factor)

    @property
    def config(self) -> Any:
        """The run configuration of the underlying store."""
        return self._store.config

    @property
    def attrs(self) -> dict[str, Any]:
        """The underlying store's chainyard attributes (a copy): the window is a selection of
        its steps, so the run's settings (e.g. the sampler kind) are the store's."""
        return self._store.attrs

    def _span(self, start: int, stop: int | None) -> tuple[int, int]:
        a, b, _ = slice(start, stop).indices(self.steps_done)
        b = max(a, b)
        lo = self._start + a * self._factor
        hi = self._start + (b - 1) * self._factor + 1 if b > a else lo
        return lo, hi

    def _pick(self, rows: NDArray[Any]) -> NDArray[Any]:
        return rows if self._factor == 1 else rows[:: self._factor]

    def column(
        self, param: int | str, start: int = 0, stop: int | None = None
    ) -> NDArray[np.float64]:
        """One parameter, shape (steps, walkers)."""
        return self._pick(self._store.column(param, *self._span(start, stop)))

    def array_names(self) -> tuple[str, ...]:
        """Names (under ``draws/``) of every per-step array of the underlying store."""
        return tuple(self._store.array_names())

    def read_rows(self, name: str, start: int, stop: int, step: int = 1) -> NDArray[Any]:
        """Window rows ``start:stop:step`` of any per-step array (e.g. a blob)."""
        rows = self._pick(self._store.read_rows(name, *self._span(start, stop)))
        return rows if step == 1 else rows[::step]

    def log_prob(self, start: int = 0, stop: int | None = None) -> NDArray[np.float64]:
        """Log-probabilities, shape (steps, walkers)."""
        return self._pick(self._store.log_prob(*self._span(start, stop)))

    def accepted(self, start: int = 0, stop: int | None = None) -> NDArray[np.bool_]:
        """Acceptance flags, shape (steps, walkers)."""
        return self._pick(self._store.accepted(*self._span(start, stop)))

    def draws(self, start: int = 0, stop: int | None = None) -> NDArray[np.float64]:
        """Positions, shape (steps, walkers, params)."""
        return self._pick(self._store.draws(*self._span(start, stop)))

    def blob(self, name: str, start: int = 0, stop: int | None = None) -> NDArray[np.float64]:
        """One blob, shape (steps, walkers)."""
        return self._pick(self._store.blob(name, *self._span(start, stop)))
