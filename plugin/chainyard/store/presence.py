"""Whether the chunks a commit recorded are on disk (one stat each, nothing read).

Below both :mod:`chainyard.store.integrity` (the resume check asks it) and
:mod:`chainyard.store.reading` (every read asks it).
"""

from __future__ import annotations

import os
from typing import TYPE_CHECKING

from chainyard.errors import StoreError
from chainyard.store.layout import INTEGRITY_KEY, chunk_key_from_metadata

if TYPE_CHECKING:  # pragma: no cover
    from chainyard.store.zarr_store import Store

__all__ = ["DAMAGED_HINT", "check_present", "has_key", "may_be_absent", "steps_label"]

DAMAGED_HINT = "the store is damaged; `chainyard verify` names every problem"


def steps_label(lo: int, hi: int) -> str:
    """``"steps 3000-3999"`` for rows ``[lo, hi)`` (0-based, inclusive range shown)."""
    return f"step {lo}" if hi - lo == 1 else f"steps {lo}-{hi - 1}"


def has_key(store: Store, key: str) -> bool:
    if store._archive is not None:
        if store._keys is None:
            store._keys = set(store._archive.namelist())
        return key in store._keys
    return os.path.isfile(store.path / key)


def may_be_absent(store: Store, node: str, index: int) -> bool:
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
        if not has_key(store, key) and not may_be_absent(store, node, i):
            where = (
                f"{node} chunk {i} ({steps_label(i * size, min((i + 1) * size, hi))})"
                if per_step
                else f"{node} chunk 0 (state before step 0)"
            )
            raise StoreError(f"{store.path}: {where} is missing: {DAMAGED_HINT}")
