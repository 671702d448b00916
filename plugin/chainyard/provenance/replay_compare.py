"""A replay's result, and the bitwise comparison of replayed rows with the stored ones.

Stored rows are read one chunk at a time; a derived (trimmed/thinned) store's rows are mapped
back to their source steps; the first differing value is named by step, array and walker.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.store import Store

__all__ = ["ReplayResult"]


@dataclass
class ReplayResult:
    """Outcome of a replay.

    Attributes
    ----------
    subject : str
        The store replayed.
    from_step, to_step : int
        Source steps ``[from_step, to_step)`` that were rerun.
    compared : int
        Stored rows compared (fewer than the steps for a thinned store).
    first_difference : dict or None
        ``{"step", "array", "walker", "stored", "replayed"}`` of the first differing value.
    sources : str
        Where the model and data were read from.
    """

    subject: str
    from_step: int
    to_step: int
    compared: int
    first_difference: dict[str, Any] | None
    sources: str

    @property
    def ok(self) -> bool:
        """True when every compared row is bitwise identical."""
        return self.first_difference is None

    def line(self) -> str:
        """One line summarising the result."""
        span = f"steps {self.from_step}-{self.to_step - 1}"
        if self.ok:
            return (
                f"{self.subject}: replayed {span} from {self.sources}: {self.compared:,} stored "
                "row(s) bitwise identical"
            )
        d = self.first_difference or {}
        return (
            f"{self.subject}: replay of {span} differs first at step {d['step']} in "
            f"{d['array']} (walker {d['walker']}: stored {d['stored']!r}, replayed "
            f"{d['replayed']!r})"
        )

    def to_dict(self) -> dict[str, Any]:
        """JSON form."""
        return {
            "subject": self.subject,
            "from_step": self.from_step,
            "to_step": self.to_step,
            "compared": self.compared,
            "ok": self.ok,
            "first_difference": self.first_difference,
            "sources": self.sources,
        }


class _StoredRows:
    """Stored rows one at a time, decoding each chunk once."""

    def __init__(self, store: Store) -> None:
        self.store = store
        self.cache: dict[str, tuple[int, NDArray[Any]]] = {}

    def row(self, name: str, j: int) -> NDArray[Any]:
        size = self.store.chunk_steps
        c = j // size
        hit = self.cache.get(name)
        if hit is None or hit[0] != c:
            lo = c * size
            hit = (c, self.store.read_rows(name, lo, min(lo + size, self.store.steps_done)))
            self.cache[name] = hit
        return hit[1][j - c * size]


def _row_map(store: Store) -> NDArray[np.int64]:
    """Source step of every stored row (identity for a sampled store)."""
    steps = np.arange(store.steps_done, dtype=np.int64)
    block = store.attrs.get("derived")
    while block:
        steps = int(block["discard"]) + steps * int(block["factor"])
        block = block.get("parent")
    return steps


def _difference(
    name: str, step: int, stored: NDArray[Any], replayed: NDArray[Any]
) -> dict[str, Any] | None:
    a = np.ascontiguousarray(stored)
    b = np.ascontiguousarray(np.asarray(replayed, dtype=a.dtype).reshape(a.shape))
    if a.tobytes() == b.tobytes():
        return None
    per_walker = a.view(np.uint8).reshape(a.shape[0], -1) != b.view(np.uint8).reshape(
        b.shape[0], -1
    )
    w = int(np.argmax(per_walker.any(axis=1)))
    return {
        "step": step,
        "array": name,
        "walker": w,
        "stored": a[w].tolist(),
        "replayed": b[w].tolist(),
    }
