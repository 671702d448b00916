"""Chunk files written directly, byte for byte as zarr would write them.

The run loop commits on a background thread while the sampler runs. zarr's write path is
Python-heavy (an asyncio loop on a thread of its own, per-chunk tasks), and every moment a
background thread holds the GIL is a moment the sampling thread waits; measured here, a
background thread writing through zarr for 10% of the time slowed emcee's loop by 8%. The
heavy parts of a commit, the codec, hashing, ``write`` and ``fsync``, release the GIL when
called directly, so the writer encodes each chunk with the same numcodecs codec zarr would
use (built from the array's own ``zarr.json``) and writes the file itself (temporary name,
then rename, as zarr's local store does). Reading decodes chunk files directly too, with
bounds (:mod:`chainyard.store.decode`); a test checks
that the bytes equal zarr's own for every codec chainyard offers.

Only codec chains listed here are encoded directly; :func:`chunk_encoder` returns None for
anything else and the store falls back to writing through zarr.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

__all__ = ["ChunkEncoder", "chunk_encoder", "fill_value", "write_chunk_file"]

_BLOSC_SHUFFLE = {"noshuffle": 0, "shuffle": 1, "bitshuffle": 2}


def _as_bytes_view(values: NDArray[Any]) -> memoryview:
    """The C-order bytes of ``values`` (little-endian), without a copy where possible."""
    arr = np.ascontiguousarray(values)
    if arr.dtype.byteorder == ">" or (arr.dtype.byteorder == "=" and sys.byteorder == "big"):
        arr = arr.astype(arr.dtype.newbyteorder("<"))
    return memoryview(arr).cast("B")


class ChunkEncoder:
    """Encodes a full chunk of one array to its stored bytes.

    Parameters
    ----------
    chunk_shape : tuple of int
        The array's chunk shape (a chunk is always encoded at this shape, padded with
        ``fill_value``, as zarr stores the chunks of a regular grid).
    dtype : numpy.dtype
        The array's data type.
    fill_value : scalar
        Value of the rows a chunk does not hold yet.
    to_bytes : callable
        Array-to-bytes step (raw little-endian bytes, or pcodec).
    compressors : list of callable
        Bytes-to-bytes steps applied in order (zstd, blosc).
    """

    def __init__(
        self,
        chunk_shape: tuple[int, ...],
        dtype: np.dtype[Any],
        fill_value: Any,
        to_bytes: Callable[[NDArray[Any]], Any],
        compressors: list[Callable[[Any], Any]],
    ) -> None:
        self.chunk_shape = chunk_shape
        self.dtype = dtype
        self.fill_value = fill_value
        self._to_bytes = to_bytes
        self._compressors = compressors

    def full_chunk(self, rows: NDArray[Any]) -> NDArray[Any]:
        """``rows`` (the first rows of a chunk) padded with the fill value to a full chunk."""
        if rows.shape == self.chunk_shape and rows.dtype == self.dtype:
            return rows
        out = np.full(self.chunk_shape, self.fill_value, dtype=self.dtype)
        out[: len(rows)] = rows
        return out

    def encode(self, rows: NDArray[Any]) -> bytes:
        """Stored bytes of the chunk whose first rows are ``rows``, shape (n <= chunk, ...)."""
        data: Any = self._to_bytes(self.full_chunk(rows))
        for step in self._compressors:
            data = step(data)
        return bytes(data) if not isinstance(data, bytes) else data


def fill_value(meta: dict[str, Any], dtype: np.dtype[Any]) -> Any:
    """The fill value of an array's ``zarr.json`` as a Python scalar of ``dtype``'s kind."""
    fill = meta.get("fill_value")
    if dtype == np.bool_:
        return bool(fill)
    if isinstance(fill, str):  # "NaN", "Infinity", "-Infinity" in zarr v3 JSON
        return float({"NaN": "nan", "Infinity": "inf", "-Infinity": "-inf"}.get(fill, fill))
    return 0 if fill is None else fill


def chunk_encoder(meta: dict[str, Any]) -> ChunkEncoder | None:
    """A direct encoder for the array described by ``meta`` (its parsed zarr.json).

    Returns None where the codec chain is not one of: ``bytes`` (little-endian), then any of
    ``zstd`` and ``blosc``; or ``numcodecs.pcodec`` alone.
    """
    import numcodecs

    try:
        dtype = np.dtype(meta["data_type"])
        chunk_shape = tuple(int(n) for n in meta["chunk_grid"]["configuration"]["chunk_shape"])
        codecs = list(meta["codecs"])
    except (KeyError, TypeError, ValueError):
        return None
    if not codecs or meta.get("chunk_grid", {}).get("name") != "regular":
        return None
    first, rest = codecs[0], codecs[1:]
    conf = first.get("configuration") or {}
    to_bytes: Callable[[NDArray[Any]], Any]
    if first.get("name") == "bytes":
        if conf.get("endian", "little") != "little":
            return None
        to_bytes = _as_bytes_view
    elif first.get("name") == "numcodecs.pcodec" and not rest:
        to_bytes = numcodecs.get_codec({"id": "pcodec", **conf}).encode
    else:
        return None
    compressors: list[Callable[[Any], Any]] = []
    for codec in rest:
        c = codec.get("configuration") or {}
        if codec.get("name") == "zstd":
            zstd = numcodecs.Zstd(level=int(c.get("level", 0)), checksum=bool(c.get("checksum")))
            compressors.append(zstd.encode)
        elif codec.get("name") == "blosc" and c.get("shuffle") in _BLOSC_SHUFFLE:
            compressors.append(
                numcodecs.Blosc(
                    cname=c["cname"],
                    clevel=int(c["clevel"]),
                    shuffle=_BLOSC_SHUFFLE[c["shuffle"]],
                    blocksize=int(c.get("blocksize", 0)),
                    typesize=int(c.get("typesize", dtype.itemsize)),
                ).encode
            )
        else:
            return None
    return ChunkEncoder(chunk_shape, dtype, fill_value(meta, dtype), to_bytes, compressors)


def write_chunk_file(path: Path, data: bytes, *, fsync: bool) -> None:
    """Replace the chunk file ``path`` by ``data`` atomically (temporary name, then rename).

    A reader or a crash sees the old chunk or the new one, never a part. The folder is not
    flushed here (the caller flushes each folder once per commit). If the write fails (an
    OSError such as ENOSPC or EFBIG), the temporary file is removed and the error re-raised.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.partial")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
    try:
        try:
            view = memoryview(data)
            while view:
                view = view[os.write(fd, view) :]
            if fsync:
                os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
    except BaseException as exc:
        tmp.unlink(missing_ok=True)  # a failed write (disk full, file too large) leaves nothing
        if isinstance(exc, OSError) and exc.filename is None:  # os.write names no file
            raise OSError(exc.errno, exc.strerror, str(path)) from exc
        raise
