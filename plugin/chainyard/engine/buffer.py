"""Rows of recent steps held in memory between commits.

The buffer always starts at a chunk boundary, so that the checksum of every chunk a commit
touches can be computed from memory (rows of the current chunk that an earlier commit already
stored are kept, or reloaded on resume).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.store import Store, chunk_checksum
from chainyard.store.layout import ACCEPTED, BLOB, LOG_PROB, POSITION

__all__ = ["StepBuffer", "update_checksums"]


class StepBuffer:
    """Rows since the start of the current chunk, plus pending (uncommitted) rows.

    ``origin`` (a chunk boundary) is the step index of row 0; rows ``[origin, committed)``
    are already stored and kept only to checksum the chunk they belong to.
    """

    def __init__(
        self, walkers: int, n_params: int, n_blobs: int, chunk: int, pending_cap: int
    ) -> None:
        size = chunk + pending_cap
        self.chunk, self.pending_cap = chunk, pending_cap
        self.position = np.empty((size, walkers, n_params))
        self.log_prob = np.empty((size, walkers))
        self.accepted = np.empty((size, walkers), dtype=bool)
        self.blobs = np.empty((n_blobs, size, walkers))
        self.origin = 0
        self.fill = 0

    def load_tail(self, store: Store, committed: int) -> None:
        """Reload the stored rows of the chunk that ``committed`` falls in."""
        self.origin = (committed // self.chunk) * self.chunk
        n = committed - self.origin
        self.fill = n
        if n:
            self.position[:n] = store.read_rows(POSITION, self.origin, committed)
            self.log_prob[:n] = store.read_rows(LOG_PROB, self.origin, committed)
            self.accepted[:n] = store.read_rows(ACCEPTED, self.origin, committed)
            for k, b in enumerate(store.blob_names):
                self.blobs[k, :n] = store.read_rows(f"{BLOB}/{b}", self.origin, committed)

    def rows(self, a: int, b: int, blob_names: tuple[str, ...]) -> dict[str, NDArray[Any]]:
        """Rows for steps ``[a, b)`` (absolute step indices)."""
        i, j = a - self.origin, b - self.origin
        out: dict[str, NDArray[Any]] = {
            POSITION: self.position[i:j],
            LOG_PROB: self.log_prob[i:j],
            ACCEPTED: self.accepted[i:j],
        }
        for k, name in enumerate(blob_names):
            out[f"{BLOB}/{name}"] = self.blobs[k, i:j]
        return out

    def drop_before(self, committed: int) -> None:
        """Forget full chunks before ``committed``; keep its chunk's rows."""
        new_origin = (committed // self.chunk) * self.chunk
        shift = new_origin - self.origin
        if shift <= 0:
            return
        keep = self.fill - shift
        for arr in (self.position, self.log_prob, self.accepted):
            arr[:keep] = arr[shift : self.fill]
        self.blobs[:, :keep] = self.blobs[:, shift : self.fill]
        self.origin, self.fill = new_origin, keep


def update_checksums(
    record: dict[str, list[str]],
    rows: Callable[[int, int], dict[str, NDArray[Any]]],
    a: int,
    b: int,
    chunk: int,
) -> dict[str, list[str]]:
    """Per-chunk checksums updated for the chunks touched by steps ``[a, b)``.

    ``rows(lo, hi)`` returns every array's rows for steps ``[lo, hi)``; it is asked for whole
    chunks (from the chunk boundary at or before ``a``).
    """
    out = {k: list(v) for k, v in record.items()}
    for ci in range(a // chunk, (b - 1) // chunk + 1):
        lo, hi = ci * chunk, min((ci + 1) * chunk, b)
        for name, values in rows(lo, hi).items():
            sums = out.setdefault(name, [])
            while len(sums) <= ci:
                sums.append("")
            sums[ci] = chunk_checksum(values)
    return out
