"""Row writes of a store (not yet committed): chunk files encoded directly, or through zarr.

:class:`RowWriter` is the writing half of :class:`chainyard.store.Store` (a mixin: the store
supplies ``path``, its arrays and its commit record). See :mod:`chainyard.store.zarr_store` for
the commit protocol and :mod:`chainyard.store.chunks` for the direct chunk writes.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import zarr
from numpy.typing import NDArray

from chainyard.store.chunks import ChunkEncoder, chunk_encoder, write_chunk_file
from chainyard.store.faults import storage_faults
from chainyard.store.files import fsync_dir
from chainyard.store.integrity import array_metadata, bytes_checksum, chunk_key_from_metadata
from chainyard.store.layout import DRAWS, POSITION

__all__ = ["RowWriter"]


class RowWriter:
    """Writing rows into a store's per-step arrays (mixed into :class:`Store`)."""

    path: Path
    _written: set[int]
    _file_sums: dict[str, dict[int, str]]
    _encoder_cache: dict[str, ChunkEncoder | None] | None
    _chunk_meta: dict[str, dict[str, Any]]

    # provided by Store
    capacity: int
    chunk_steps: int
    steps_done: int

    def _array(self, name: str) -> zarr.Array:  # pragma: no cover - Store overrides
        raise NotImplementedError

    def array_names(self) -> tuple[str, ...]:  # pragma: no cover - Store overrides
        raise NotImplementedError

    def ensure_capacity(self, steps: int) -> None:
        """Grow every per-step array to hold at least ``steps`` rows."""
        if steps <= self.capacity:
            return
        with storage_faults(self.path, committed=self.steps_done):
            for name in self.array_names():
                arr = self._array(name)
                arr.resize((steps, *arr.shape[1:]))

    def _encoders(self) -> dict[str, ChunkEncoder | None]:
        """Direct chunk encoders of the per-step arrays (None where zarr must write)."""
        if self._encoder_cache is None:
            meta = array_metadata(self)
            self._chunk_meta = {name: meta[f"{DRAWS}/{name}"] or {} for name in self.array_names()}
            self._encoder_cache = {name: chunk_encoder(m) for name, m in self._chunk_meta.items()}
        return self._encoder_cache

    def write_steps(
        self,
        rows: dict[str, NDArray[Any]],
        origin: int,
        start: int,
        stop: int,
        *,
        fsync: bool,
    ) -> None:
        """Write steps ``[start, stop)`` of every array, whole chunks at a time (not committed).

        ``rows[name]`` holds the array's rows ``[origin, stop)``, where ``origin`` is the
        chunk boundary at or before ``start``, so every chunk touched is encoded from memory
        (rows a chunk does not hold yet are the fill value) and no chunk is read back.
        Arrays whose codec chain :func:`chainyard.store.chunks.chunk_encoder` does not cover
        are written through zarr. The stored-byte checksums of the chunk files written here
        are kept for the next :meth:`commit`.

        Raises
        ------
        StorageFaultError
            If the file system refuses a write (temporary files removed; the last commit is
            intact).
        """
        with storage_faults(self.path, committed=self.steps_done):
            self._write_steps(rows, origin, start, stop, fsync=fsync)

    def _write_steps(
        self,
        rows: dict[str, NDArray[Any]],
        origin: int,
        start: int,
        stop: int,
        *,
        fsync: bool,
    ) -> None:
        encoders = self._encoders()
        size = self.chunk_steps
        if origin % size or not origin <= start <= stop:
            raise ValueError(f"bad step range: origin {origin}, start {start}, stop {stop}")
        if stop == start:
            return
        first, last = start // size, (stop - 1) // size
        folders: set[Path] = set()
        for name, values in rows.items():
            enc = encoders.get(name)
            if enc is None:
                self.write_rows(start, {name: values[start - origin :]}, fsync=fsync)
                continue
            sums = self._file_sums.setdefault(name, {})
            for ci in range(first, last + 1):
                lo, hi = ci * size, min((ci + 1) * size, stop)
                data = enc.encode(values[lo - origin : hi - origin])
                key = chunk_key_from_metadata(f"{DRAWS}/{name}", self._chunk_meta[name], ci)
                path = self.path / key
                folder = path.parent
                while not folder.exists():  # new folders: their entries must be flushed too
                    folders.add(folder.parent)
                    folder = folder.parent
                write_chunk_file(path, data, fsync=fsync)
                folders.add(path.parent)
                sums[ci] = bytes_checksum(data)
        self._written.update(range(first, last + 1))
        if fsync:
            for folder in sorted(folders):
                fsync_dir(folder)

    def write_rows(self, start: int, rows: dict[str, NDArray[Any]], *, fsync: bool) -> None:
        """Write rows ``[start, start + n)`` of every array through zarr (not yet committed)."""
        with storage_faults(self.path, committed=self.steps_done):
            self._write_rows(start, rows, fsync=fsync)

    def _write_rows(self, start: int, rows: dict[str, NDArray[Any]], *, fsync: bool) -> None:
        n = len(rows[POSITION])
        size = 0
        for name, values in rows.items():
            arr = self._array(name)
            arr[start : start + n] = values
            size = int(arr.chunks[0])
        if n:
            self._written.update(range(start // size, (start + n - 1) // size + 1))
        if fsync:
            self._fsync_rows(start, start + n, list(rows))

    def _fsync_rows(self, start: int, stop: int, names: list[str]) -> None:
        size = self.chunk_steps
        for name in names:
            arr = self._array(name)
            trailing = "/".join("0" for _ in arr.shape[1:])
            base = self.path / DRAWS / name / "c"
            for i in range(start // size, (stop - 1) // size + 1):
                chunk = base / str(i) / trailing if trailing else base / str(i)
                if chunk.exists():
                    fd = os.open(chunk, os.O_RDONLY)
                    try:
                        os.fsync(fd)
                    finally:
                        os.close(fd)
                    fsync_dir(chunk.parent)
