"""Chunk sizes in a pack: each array's declared chunk within ``chunk_bytes``, and no chunk
member larger than such a chunk can be when encoded.

Part of the safety rules :func:`chainyard.store.packed.open_pack` applies (listed there).
"""

from __future__ import annotations

import math
import zipfile
from pathlib import Path
from typing import Any

from chainyard import limits
from chainyard.store.pack_zip import UnsafeMemberError, _json_member

__all__ = ["declared_chunk_bytes", "most_chunk_file_bytes"]

#: an encoded chunk may exceed its decoded size by this factor plus this many bytes
_CHUNK_SLACK = (2, 64 * 1024)
_ITEMSIZE = {
    "bool": 1,
    "int8": 1,
    "uint8": 1,
    "int16": 2,
    "uint16": 2,
    "float16": 2,
    "int32": 4,
    "uint32": 4,
    "float32": 4,
    "int64": 8,
    "uint64": 8,
    "float64": 8,
    "complex64": 8,
    "complex128": 16,
}


def declared_chunk_bytes(meta: dict[str, Any], what: str) -> int:
    """Decoded bytes of one chunk of the array described by zarr metadata ``meta``, checked
    against the ``chunk_bytes`` limit (``what`` names the file in the message).

    Raises
    ------
    ValueError
        If the metadata has no readable ``chunk_shape`` and ``data_type`` (the message says
        which); :class:`~chainyard.errors.LimitExceededError` above the limit.
    """
    try:
        shape = meta["chunk_grid"]["configuration"]["chunk_shape"]
        dims = [int(n) for n in shape]
        itemsize = _ITEMSIZE[str(meta["data_type"])]
    except (KeyError, TypeError, ValueError):
        raise ValueError("array metadata without a readable chunk_shape and data_type") from None
    if any(n < 1 for n in dims):
        raise ValueError(f"chunk_shape {dims} has a size below 1")
    nbytes = math.prod(dims) * itemsize
    limits.check("chunk_bytes", nbytes, f"{what} (chunk_shape {dims})")
    return nbytes


def most_chunk_file_bytes(chunk_bytes: int) -> int:
    """Largest stored (encoded) size accepted for a chunk of ``chunk_bytes`` decoded bytes."""
    return _CHUNK_SLACK[0] * chunk_bytes + _CHUNK_SLACK[1]


def _chunk_rules(where: Path, archive: zipfile.ZipFile, infos: dict[str, zipfile.ZipInfo]) -> None:
    """Declared chunk sizes within ``chunk_bytes``; chunk members no larger than a chunk."""
    arrays: dict[str, int] = {}
    for name in sorted(infos):
        if not name.endswith("/zarr.json") or name.startswith("pack/"):
            continue
        meta = _json_member(archive, infos, where, name)
        if not isinstance(meta, dict) or meta.get("node_type") != "array":
            continue
        try:
            nbytes = declared_chunk_bytes(meta, f"{where}: {name}")
        except ValueError as exc:
            raise UnsafeMemberError(where, name, str(exc)) from None
        arrays[name[: -len("zarr.json")]] = nbytes
    for name, info in infos.items():
        prefix = name.rsplit("/c/", 1)[0] + "/" if "/c/" in name else None
        if prefix in arrays:
            most = most_chunk_file_bytes(arrays[prefix])
            if info.file_size > most:
                raise UnsafeMemberError(
                    where,
                    name,
                    f"{info.file_size:,} bytes, more than a chunk of this array can hold "
                    f"encoded ({most:,})",
                )
