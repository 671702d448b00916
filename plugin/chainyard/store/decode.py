"""Bounded decoding of one stored chunk: the size limit holds *before* anything is decoded.

A chunk file comes from a store or pack someone else may have written. zarr's own decoding
trusts the sizes a compressed stream declares (a zstd frame declaring 1 GiB gets 1 GiB; one
declaring nothing is decompressed as a stream, without end). Here every chunk is decoded into
a buffer of exactly the chunk's size (chunk shape x item size, itself within ``chunk_bytes``)
after the stream's own header has been checked against that size:

==================  ========================================================================
codec (zarr name)   check before decoding, and the bound while decoding
==================  ========================================================================
``bytes``           the file holds exactly the chunk's bytes
``zstd``            one frame header with a declared content size equal to the chunk bytes
                    (frames declaring no size, skippable frames and dictionaries refused);
                    decoded into a buffer of that size (zstd stops at its end)
``blosc``           16-byte header: uncompressed size equal to the chunk bytes, compressed
                    size equal to the file's, block size within it; decoded into that buffer
``gzip``            ``zlib.decompressobj`` asked for at most the chunk bytes plus one
``numcodecs.pcodec`` decoded into a preallocated array of the chunk's values; more values
                    than that, or fewer, is damage
==================  ========================================================================

Any other codec, these in another order or more than one compressor is refused
(:func:`codec_problem`): chainyard writes ``bytes`` followed by zstd or blosc, ``bytes``
alone, or pcodec alone.
"""

from __future__ import annotations

import struct
import sys
import zlib
from typing import Any

import numpy as np
from numpy.typing import NDArray

__all__ = ["ALLOWED", "ChunkDecodeError", "codec_problem", "decode_chunk"]

#: codec chains read: an array-to-bytes codec, then bytes-to-bytes compressors
ALLOWED = {"serializers": ("bytes", "numcodecs.pcodec"), "compressors": ("zstd", "blosc", "gzip")}

_ZSTD_MAGIC = 0xFD2FB528


class ChunkDecodeError(ValueError):
    """A chunk's stored bytes break a bound or do not decode (the message says which)."""


def codec_problem(codecs: Any) -> str | None:
    """Why the codec list of an array's ``zarr.json`` is not read here (None if it is)."""
    if not isinstance(codecs, list) or not codecs:
        return "not a non-empty list of codecs"
    names = [c.get("name") if isinstance(c, dict) else None for c in codecs]
    if names[0] not in ALLOWED["serializers"]:
        return f"codec {names[0]!r} first (allowed: {', '.join(ALLOWED['serializers'])})"
    if names[0] == "numcodecs.pcodec" and len(names) > 1:
        return "pcodec followed by other codecs (pcodec is used alone)"
    if len(names) > 2:
        return "more than one compressor (chainyard writes at most one)"
    for name in names[1:]:
        if name not in ALLOWED["compressors"]:
            return (
                f"codec {name!r} is not read by chainyard "
                f"(allowed after 'bytes': {', '.join(ALLOWED['compressors'])})"
            )
    return None


def zstd_content_size(data: bytes) -> int | None:
    """Content size declared by the zstd frame header at the start of ``data``.

    Returns None when the frame declares none. Format: RFC 8878, section 3.1.1.1.

    Raises
    ------
    ChunkDecodeError
        If ``data`` does not start with a zstd frame without a dictionary.
    """
    if len(data) < 6:
        raise ChunkDecodeError("zstd frame shorter than its header")
    (magic,) = struct.unpack_from("<I", data, 0)
    if magic != _ZSTD_MAGIC:
        if magic & 0xFFFFFFF0 == 0x184D2A50:
            raise ChunkDecodeError("zstd skippable frame (no chunk data)")
        raise ChunkDecodeError("not a zstd frame (bad magic number)")
    fhd = data[4]
    fcs_flag, single, reserved, dict_flag = fhd >> 6, (fhd >> 5) & 1, (fhd >> 3) & 1, fhd & 3
    if reserved:
        raise ChunkDecodeError("zstd frame header has its reserved bit set")
    if dict_flag:
        raise ChunkDecodeError("zstd frame needs a dictionary")
    at = 5 + (0 if single else 1)  # window descriptor
    size = (1 if single else 0) if fcs_flag == 0 else (2, 4, 8)[fcs_flag - 1]
    if size == 0:
        return None
    if len(data) < at + size:
        raise ChunkDecodeError("zstd frame shorter than its header")
    value = int.from_bytes(data[at : at + size], "little")
    return value + 256 if size == 2 else value


def _zstd(data: bytes, nbytes: int) -> bytes | bytearray:
    from numcodecs import zstd

    declared = zstd_content_size(data)
    if declared is None:
        raise ChunkDecodeError("zstd frame declares no content size")
    if declared != nbytes:
        raise ChunkDecodeError(
            f"zstd frame declares {declared:,} bytes, the chunk holds {nbytes:,}"
        )
    out = bytearray(nbytes)
    zstd.decompress(data, out)  # never writes past the buffer it is given
    return out


def _blosc(data: bytes, nbytes: int) -> bytes | bytearray:
    from numcodecs import blosc

    if len(data) < 16:
        raise ChunkDecodeError("blosc chunk shorter than its header")
    declared, block, stored = struct.unpack_from("<III", data, 4)
    if declared != nbytes:
        raise ChunkDecodeError(
            f"blosc header declares {declared:,} bytes, the chunk holds {nbytes:,}"
        )
    if stored != len(data):
        raise ChunkDecodeError(
            f"blosc header declares {stored:,} stored bytes, the file holds {len(data):,}"
        )
    if nbytes and not 0 < block <= nbytes:
        raise ChunkDecodeError(f"blosc header declares a block of {block:,} bytes")
    out = bytearray(nbytes)
    blosc.decompress(data, out)
    return out


def _gzip(data: bytes, nbytes: int) -> bytes:
    d = zlib.decompressobj(wbits=47)  # gzip or zlib header
    out = d.decompress(data, nbytes + 1)
    if len(out) > nbytes or d.unconsumed_tail:
        raise ChunkDecodeError(f"gzip stream holds more than the chunk's {nbytes:,} bytes")
    out += d.flush(nbytes + 1 - len(out))
    if len(out) != nbytes or not d.eof:
        raise ChunkDecodeError(f"gzip stream holds {len(out):,} bytes, the chunk {nbytes:,}")
    return out


def _pcodec(data: bytes, shape: tuple[int, ...], dtype: np.dtype[Any]) -> NDArray[Any]:
    from pcodec import standalone

    out = np.empty(int(np.prod(shape)), dtype=dtype)
    progress = standalone.simple_decompress_into(data, out)
    if progress.n_processed != out.size or not progress.finished:
        raise ChunkDecodeError(
            f"pcodec data holds {'more' if progress.n_processed == out.size else 'fewer'} "
            f"values than the chunk's {out.size:,}"
        )
    return out.reshape(shape)


def decode_chunk(
    codecs: list[dict[str, Any]], data: bytes, shape: tuple[int, ...], dtype: np.dtype[Any]
) -> NDArray[Any]:
    """The values of one chunk, shape ``shape``, from its stored bytes.

    Parameters
    ----------
    codecs : list of dict
        The ``codecs`` of the array's ``zarr.json`` (checked by :func:`codec_problem`).
    data : bytes
        The chunk file's bytes.
    shape : tuple of int
        The chunk shape (decoded bytes = product x ``dtype.itemsize``, within ``chunk_bytes``).
    dtype : numpy.dtype
        The array's data type.

    Raises
    ------
    ChunkDecodeError
        If the bytes break a bound or fail to decode; memory stays within the chunk's size.
    """
    problem = codec_problem(codecs)
    if problem:
        raise ChunkDecodeError(problem)
    first, rest = codecs[0], codecs[1:]
    nbytes = int(np.prod(shape)) * dtype.itemsize
    try:
        if first["name"] == "numcodecs.pcodec":
            return _pcodec(data, shape, dtype)
        raw: bytes | bytearray = data
        for codec in reversed(rest):  # compressors were applied in order: undo the last first
            step = {"zstd": _zstd, "blosc": _blosc, "gzip": _gzip}[codec["name"]]
            raw = step(raw, nbytes)
        if len(raw) != nbytes:
            raise ChunkDecodeError(f"{len(raw):,} bytes where the chunk holds {nbytes:,}")
        endian = (first.get("configuration") or {}).get("endian", "little")
        order = "<" if endian == "little" or dtype.itemsize == 1 else ">"
        values = np.frombuffer(raw, dtype=dtype.newbyteorder(order)).reshape(shape)
        if order == ">" or sys.byteorder == "big":
            values = values.astype(dtype.newbyteorder("="))
        return values
    except ChunkDecodeError:
        raise
    except MemoryError:
        raise
    except Exception as exc:  # a codec's own failure on damaged bytes
        text = " ".join(str(exc).split())[:100] or type(exc).__name__
        raise ChunkDecodeError(f"{type(exc).__name__}: {text}") from None
