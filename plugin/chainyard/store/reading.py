"""Checked, bounded reads of stored chunks: the one place chunk files are read and decoded.

Every array read (:meth:`chainyard.store.Store.draws`, ``column``, ``read_rows``, the start
state, ...) goes through :func:`read`, so every command that reads a store gets the same
checks, cheaply (the checksums are already in the commit record):

* once per opened store, the **seal** (:func:`chainyard.store.integrity.check_seal`): the
  commit record, the ``zarr.json`` attributes and every array's metadata against the hashes
  the last commit recorded (``steps_done`` edited upward, an edited config, ...);
* for every chunk read, its **stored bytes** against the BLAKE2b-128 the commit recorded (a
  partially committed last chunk whose bytes differ, e.g. rows past the commit from an
  interrupted run, is judged by the checksum of its committed decoded rows instead);
* a committed chunk that is missing is an error (zarr would read it as the fill value),
  unless the record says no file was written because it holds only the fill value;
* decoding is **bounded** (:mod:`chainyard.store.decode`): the stream's declared size must
  equal the chunk's before anything is decompressed.

Any failure is a :class:`~chainyard.errors.StoreError` (exit 4) naming the array, the chunk
and its steps. ``checked=False`` skips the checksum comparisons (not the bounds): for
``chainyard verify`` and the resume check, which compare and report themselves.
"""

from __future__ import annotations

import json
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from chainyard.errors import LimitExceededError, StoreError
from chainyard.store.decode import ChunkDecodeError, decode_chunk
from chainyard.store.integrity import bytes_checksum, check_seal, chunk_checksum
from chainyard.store.layout import INTEGRITY_KEY, chunk_key_from_metadata
from chainyard.store.presence import DAMAGED_HINT as _HINT
from chainyard.store.presence import check_present, may_be_absent, steps_label

if TYPE_CHECKING:  # pragma: no cover
    from chainyard.store.zarr_store import Store

__all__ = ["check_present", "read", "steps_label"]


class _Layout:
    """What decoding one array's chunks needs, from its ``zarr.json``."""

    def __init__(self, meta: dict[str, Any]) -> None:
        from chainyard.store.chunks import fill_value

        self.meta = meta
        self.shape = tuple(int(n) for n in meta["chunk_grid"]["configuration"]["chunk_shape"])
        self.dtype = np.dtype(str(meta["data_type"]))
        self.fill = fill_value(meta, self.dtype)
        self.codecs = list(meta["codecs"])


def _layout(store: Store, node: str) -> _Layout:
    cache: dict[str, Any] = store._layouts
    found = cache.get(node)
    if found is None:
        info = store._info.get(node)
        if info is not None:
            meta = info.meta
        else:  # a store being created (not validated yet): its own fresh metadata
            raw = store.read_bytes(f"{node}/zarr.json")
            if raw is None:
                raise StoreError(f"{store.path}/{node}/zarr.json: missing; {_HINT}")
            meta = json.loads(raw)
        try:
            found = cache[node] = _Layout(meta)
        except (KeyError, TypeError, ValueError) as exc:
            raise StoreError(
                f"{store.path}/{node}/zarr.json: unreadable chunk layout ({exc}); {_HINT}"
            ) from None
    return found


def _recorded(store: Store, node: str, index: int) -> tuple[bool, Any, Any]:
    """(recorded?, stored-byte sum, decoded-rows sum) the commit holds for one chunk."""
    block = store._commit.get(INTEGRITY_KEY)
    if not isinstance(block, dict):
        return False, None, None
    group, name = node.split("/", 1)
    if group == "start":
        entry = (block.get("start") or {}).get(name)
        if not isinstance(entry, dict) or "file" not in entry:
            return False, None, None
        return True, entry["file"], entry.get("rows")
    column = (block.get("files") or {}).get(name)
    if not isinstance(column, list) or index >= len(column):
        return False, None, None
    rows = ((store._commit.get("checksums") or {}).get(name) or [])[index:][:1]
    return True, column[index], rows[0] if rows else None


def _chunk(store: Store, node: str, index: int, checked: bool) -> NDArray[Any]:
    """Chunk ``index`` of ``node`` decoded (full chunk shape), checked if ``checked``."""
    lay = _layout(store, node)
    per_step = node.startswith("draws/")
    n = int(store._commit.get("steps_done", 0))  # no record yet while a store is created
    size = lay.shape[0]
    lo, hi = index * size, (index + 1) * size
    committed = lo < n if per_step else True
    if per_step:
        where = f"{node} chunk {index} ({steps_label(lo, min(hi, n) if committed else hi)})"
    else:
        where = f"{node} chunk 0 (state before step 0)"
    key = chunk_key_from_metadata(node, lay.meta, index)
    try:
        data = store.read_bytes(key)
    except LimitExceededError:
        raise
    except OSError as exc:
        raise StoreError(
            f"{store.path}: {where} cannot be read ({exc.strerror or exc}): {_HINT}"
        ) from None
    recorded, want_file, want_rows = _recorded(store, node, index) if committed else (0, 0, 0)
    if data is None:
        if committed and not may_be_absent(store, node, index):
            raise StoreError(f"{store.path}: {where} is missing: {_HINT}")
        return np.full(lay.shape, lay.fill, dtype=lay.dtype)
    matches = None
    if checked and committed:
        if not recorded:
            raise StoreError(f"{store.path}: commit.json records no checksum for {where}: {_HINT}")
        matches = want_file is not None and bytes_checksum(data) == want_file
        if not matches and (not per_step or hi <= n):
            raise StoreError(f"{store.path}: {where} does not match its recorded checksum: {_HINT}")
    try:
        values = decode_chunk(lay.codecs, data, lay.shape, lay.dtype)
    except ChunkDecodeError as exc:
        raise StoreError(f"{store.path}: {where} cannot be decoded ({exc}): {_HINT}") from None
    # a partial last chunk whose bytes differ: its committed rows decide
    if matches is False and (want_rows is None or chunk_checksum(values[: n - lo]) != want_rows):
        raise StoreError(f"{store.path}: {where} does not match its recorded checksum: {_HINT}")
    return values


def read(
    store: Store,
    node: str,
    start: int,
    stop: int,
    step: int = 1,
    column: int | None = None,
    *,
    checked: bool = True,
) -> NDArray[Any]:
    """Rows ``start:stop:step`` of ``node`` (optionally one column of the last axis).

    A start array (``start/...``) is returned whole. Chunks holding committed rows must exist
    and, when ``checked``, match the commit (module docstring); rows past the commit may be
    absent (they read as the fill value).

    Raises
    ------
    StoreError
        Naming the array, chunk and steps of the first chunk that is missing, differs from
        its recorded checksum, breaks a decoding bound or fails to decode; or the seal.
    """
    if checked and not store._seal_checked:
        check_seal(store, _HINT)
        store._seal_checked = True
    if not node.startswith("draws/"):
        return _chunk(store, node, 0, checked)
    lay = _layout(store, node)
    size = lay.shape[0]
    start, stop, step = slice(start, stop, step).indices(int(store._node(node).shape[0]))
    rows = range(start, stop, step)
    tail = lay.shape[1:] if column is None else lay.shape[1:-1]
    out = np.empty((len(rows), *tail), dtype=lay.dtype)
    k = 0
    if not rows:
        return out
    for i in range(rows[0] // size, rows[-1] // size + 1):
        lo, hi = i * size, min((i + 1) * size, stop)
        first = start if lo <= start else start + -(-(lo - start) // step) * step
        if first >= hi:
            continue
        values = _chunk(store, node, i, checked)
        local = slice(first - lo, hi - lo, step)
        block = values[local] if column is None else values[local, ..., column]
        out[k : k + len(block)] = block
        k += len(block)
    return out
