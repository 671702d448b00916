"""Guarded reads of stored chunks: a missing or damaged chunk is a one-line StoreError.

zarr reads a missing chunk as the fill value (NaN rows, silently) and lets a codec failure
escape as whatever the codec raises. The store reads every array through :func:`read`, which
first checks that the committed chunks it will touch exist (unless the commit record says the
chunk was never written because it holds only the fill value), and turns any decode failure
into :class:`~chainyard.errors.StoreError` naming the array, the chunk and its steps.
"""

from __future__ import annotations

import os
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from chainyard.errors import StoreError
from chainyard.store.integrity import INTEGRITY_KEY, chunk_key_from_metadata

if TYPE_CHECKING:  # pragma: no cover
    from chainyard.store.zarr_store import Store

__all__ = ["read", "steps_label"]

_HINT = "the store is damaged; `chainyard verify` names every problem"


def steps_label(lo: int, hi: int) -> str:
    """``"steps 3000-3999"`` for rows ``[lo, hi)`` (0-based, inclusive range shown)."""
    return f"step {lo}" if hi - lo == 1 else f"steps {lo}-{hi - 1}"


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= 120 else text[:117] + "..."


def _has_key(store: Store, key: str) -> bool:
    if store._archive is not None:
        if store._keys is None:
            store._keys = set(store._archive.namelist())
        return key in store._keys
    return os.path.isfile(store.path / key)


def _may_be_absent(store: Store, node: str, index: int) -> bool:
    """Whether the commit record says chunk ``index`` of ``node`` holds only the fill value."""
    block = store._commit.get(INTEGRITY_KEY)
    group, name = node.split("/", 1)
    if isinstance(block, dict):
        if group == "start":
            entry = (block.get("start") or {}).get(name)
            return isinstance(entry, dict) and "file" in entry and entry["file"] is None
        column = (block.get("files") or {}).get(name)
        return isinstance(column, list) and index < len(column) and column[index] is None
    return name == "accepted"  # no record: only an all-False acceptance chunk may be absent


def check_present(store: Store, node: str, lo: int, hi: int) -> None:
    """Raise if a chunk holding committed rows ``[lo, hi)`` of ``node`` is missing."""
    info = store._info.get(node)
    if info is None or hi <= lo:
        return
    per_step = node.startswith("draws/")
    size = info.chunks[0] if per_step else 1
    for i in range(lo // size, -(-hi // size)) if per_step else (0,):
        key = chunk_key_from_metadata(node, info.meta, i)
        if not _has_key(store, key) and not _may_be_absent(store, node, i):
            where = (
                f"{node} chunk {i} ({steps_label(i * size, min((i + 1) * size, hi))})"
                if per_step
                else f"{node} chunk 0 (state before step 0)"
            )
            raise StoreError(f"{store.path}: {where} is missing: {_HINT}")


def read(
    store: Store,
    node: str,
    start: int,
    stop: int,
    step: int = 1,
    column: int | None = None,
) -> NDArray[Any]:
    """Rows ``start:stop:step`` of ``node`` (optionally one column of the last axis).

    Chunks holding committed rows must exist (see :func:`check_present`); rows past the
    commit may be absent (they read as the fill value). Any failure to decode becomes a
    StoreError naming the first chunk that fails.
    """
    arr = store._node(node)
    per_step = node.startswith("draws/")
    if per_step:
        check_present(store, node, start, min(stop, store.steps_done))
    else:
        check_present(store, node, 0, 1)
    try:
        if not per_step:
            return np.asarray(arr[...])
        sel: Any = slice(start, stop, step)
        return np.asarray(arr[sel] if column is None else arr[sel, :, column])
    except MemoryError:  # too large a read for this machine: not damage
        raise
    except Exception as exc:  # codec, zarr or size errors of an untrusted chunk
        located = _locate(store, node, arr, start, stop, exc)
        if located is None:  # every chunk reads alone: not damage (threads, resources)
            raise
        raise located from None


def _locate(
    store: Store, node: str, arr: Any, start: int, stop: int, exc: Exception
) -> StoreError | None:
    """A StoreError naming the first chunk of ``[start, stop)`` that fails to decode; None if
    each of them decodes alone (the failure was not in the stored data)."""
    if not node.startswith("draws/"):
        return StoreError(
            f"{store.path}: {node} chunk 0 (state before step 0) cannot be decoded "
            f"({_one_line(exc)}): {_HINT}"
        )
    size = store._info[node].chunks[0]
    for i in range(start // size, -(-stop // size)):
        lo, hi = i * size, min((i + 1) * size, arr.shape[0])
        try:
            arr[lo:hi]
        except MemoryError:
            raise
        except Exception as chunk_exc:
            return StoreError(
                f"{store.path}: {node} chunk {i} ({steps_label(lo, hi)}) cannot be decoded "
                f"({_one_line(chunk_exc)}): {_HINT}"
            )
    return None
