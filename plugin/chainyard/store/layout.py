"""Names and codecs of the chainyard store layout (format version 1).

A store is a zarr v3 group (a directory by default)::

    STORE/
      zarr.json              group attributes under the key "chainyard" (see below)
      commit.json            the commit record: committed step count, sampler RNG state,
                             per-chunk checksums, segment history (replaced atomically)
      start/position         (walkers, params) float64: positions before step 1
      start/log_prob         (walkers,) float64
      start/blob/<name>      (walkers,) float64, one per configured blob
      draws/position         (steps, walkers, params) float64
      draws/log_prob         (steps, walkers) float64
      draws/accepted         (steps, walkers) bool: the walker moved at this step
      draws/blob/<name>      (steps, walkers) float64

Rows at or past ``commit.json``'s ``steps_done`` are not part of the result: they may hold a
partial write from a killed process and are overwritten when the run continues. Every array
is chunked along steps only (``storage.chunk_steps`` rows per chunk).

Group attributes (``zarr.json`` -> ``attributes.chainyard``): ``format``, ``format_version``,
``param_names``, ``blob_names``, ``walkers``, ``replica``, ``seed``, ``config`` (normalised),
``config_hash``, ``identity`` (everything that determines the draws, with content hashes),
``provenance`` (software and host at creation) and ``created_by`` (software, host, git state
and time of the process that created this store: for a derived store, the derivation).

``commit.json`` holds ``steps_done``, ``random_state``, ``checksums`` (BLAKE2b-128 of the
decoded rows of every committed chunk), ``segments`` and an ``integrity`` block (checksums of
the stored chunk bytes and start state, the metadata seal, the RNG state at each segment's
start; see :mod:`chainyard.store.integrity`). A store packed into one zip file has the same
keys at the zip's root.
"""

from __future__ import annotations

from typing import Any

FORMAT_NAME = "chainyard.store"
FORMAT_VERSION = 1
ATTRS_KEY = "chainyard"
COMMIT_FILE = "commit.json"

DRAWS = "draws"
START = "start"
POSITION = "position"
LOG_PROB = "log_prob"
ACCEPTED = "accepted"
BLOB = "blob"
#: the commit record's block of seal and checksums (chainyard.store.integrity)
INTEGRITY_KEY = "integrity"

__all__ = [
    "ACCEPTED",
    "ATTRS_KEY",
    "BLOB",
    "COMMIT_FILE",
    "DRAWS",
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "INTEGRITY_KEY",
    "LOG_PROB",
    "POSITION",
    "START",
    "chunk_key_from_metadata",
    "codec_kwargs",
]


def codec_kwargs(codec: str, level: int | None, dtype: str) -> dict[str, Any]:
    """Keyword arguments for ``zarr.create_array`` giving a lossless encoding.

    Parameters
    ----------
    codec : {"pcodec", "zstd", "blosc_zstd", "lz4", "none"}
        The storage codec from the run config. Booleans always use zstd (pcodec has no
        boolean type).
    level : int or None
        Codec level (None: the codec's default used here: pcodec 8, zstd 3, blosc 5).
    dtype : str
        numpy dtype name of the array.
    """
    from zarr.codecs import BloscCodec, ZstdCodec

    if codec == "none":
        return {"compressors": None}
    if dtype == "bool" or codec == "zstd":
        return {"compressors": [ZstdCodec(level=3 if level is None else level)]}
    if codec == "pcodec":
        from zarr.codecs.numcodecs import PCodec

        # lookback delta finds the rows that repeat when a walker's proposal is rejected
        return {
            "serializer": PCodec(
                level=8 if level is None else min(level, 12), delta_spec="try_lookback"
            ),
            "compressors": None,
        }
    if codec == "blosc_zstd":
        return {
            "compressors": [
                BloscCodec(
                    cname="zstd", clevel=5 if level is None else min(level, 9), shuffle="shuffle"
                )
            ]
        }
    if codec == "lz4":
        return {
            "compressors": [
                BloscCodec(
                    cname="lz4", clevel=5 if level is None else min(level, 9), shuffle="shuffle"
                )
            ]
        }
    raise ValueError(f"unknown codec {codec!r}")


def chunk_key_from_metadata(node: str, meta: dict[str, Any], index: int) -> str:
    """Key of chunk ``index`` along the first axis, from an array's zarr.json (no zarr call)."""
    enc = meta.get("chunk_key_encoding") or {}
    conf = enc.get("configuration") or {}
    coords = [str(index)] + ["0"] * (len(meta["shape"]) - 1)
    if enc.get("name") == "v2":
        return f"{node}/" + conf.get("separator", ".").join(coords)
    sep = conf.get("separator", "/")
    return f"{node}/c{sep}" + sep.join(coords)
