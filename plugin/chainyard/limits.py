"""Documented limits on what foreign input (a store, a pack, a config) can make chainyard
allocate or write.

Each limit has a default and an environment variable that overrides it (a plain integer of
bytes or items). Readers check *declared* sizes against these limits before allocating and
raise :class:`~chainyard.errors.LimitExceededError` naming the limit and its variable.

==================  ===========  ================================  ==============================
limit               default      environment variable              what it bounds
==================  ===========  ================================  ==============================
chunk_bytes         64 MiB       CHAINYARD_MAX_CHUNK_BYTES         one decoded chunk (declared
                                                                   chunk shape x item size)
metadata_bytes      64 MiB       CHAINYARD_MAX_METADATA_BYTES      one JSON file read whole
pack_member_bytes   4 GiB        CHAINYARD_MAX_PACK_MEMBER_BYTES   one pack member (streamed)
pack_total_bytes    64 GiB       CHAINYARD_MAX_PACK_TOTAL_BYTES    all members of a pack
pack_members        200,000      CHAINYARD_MAX_PACK_MEMBERS        members of a pack
pack_ratio          200          CHAINYARD_MAX_PACK_RATIO          compression ratio of a
                                                                   member above 1 MiB
==================  ===========  ================================  ==============================

Why these defaults: a chunk is decoded whole, so ``chunk_bytes`` bounds the memory one chunk
read can take (the default chunking, 1,000 steps, stays below it up to ~8,000 values per
step); pack members are hashed and copied in 1 MiB blocks, so their limits bound disk use, not
memory; deflate cannot exceed a ratio of about 1,030 and chainyard stores chunks uncompressed
in a pack and JSON at ratios well below 100 (common practice, no source), so a ratio above
200 on a large member is a zip bomb. The member count bounds the memory of the zip's member
list (a few hundred bytes per member).
"""

from __future__ import annotations

import os
from dataclasses import dataclass

from chainyard.errors import LimitExceededError

__all__ = ["LIMITS", "Limit", "check", "value"]


@dataclass(frozen=True)
class Limit:
    """One limit: its name, default, environment variable and meaning."""

    name: str
    default: int
    env: str
    meaning: str


LIMITS: dict[str, Limit] = {
    lim.name: lim
    for lim in (
        Limit(
            "chunk_bytes",
            64 * 2**20,
            "CHAINYARD_MAX_CHUNK_BYTES",
            "decoded size of one stored chunk (steps per chunk x row size)",
        ),
        Limit(
            "metadata_bytes",
            64 * 2**20,
            "CHAINYARD_MAX_METADATA_BYTES",
            "size of one JSON metadata file (zarr.json, commit.json, records, manifests)",
        ),
        Limit(
            "pack_member_bytes",
            4 * 2**30,
            "CHAINYARD_MAX_PACK_MEMBER_BYTES",
            "uncompressed size of one member of a pack",
        ),
        Limit(
            "pack_total_bytes",
            64 * 2**30,
            "CHAINYARD_MAX_PACK_TOTAL_BYTES",
            "uncompressed size of all members of a pack together",
        ),
        Limit(
            "pack_members",
            200_000,
            "CHAINYARD_MAX_PACK_MEMBERS",
            "number of members in a pack",
        ),
        Limit(
            "pack_ratio",
            200,
            "CHAINYARD_MAX_PACK_RATIO",
            "uncompressed / compressed size of one pack member above 1 MiB (zip bombs)",
        ),
    )
}


def value(name: str) -> int:
    """The limit ``name`` in force (its environment variable, else the default)."""
    lim = LIMITS[name]
    raw = os.environ.get(lim.env)
    if raw is None or not raw.strip():
        return lim.default
    try:
        got = int(raw)
    except ValueError:
        got = -1
    if got < 1:
        raise LimitExceededError(f"{lim.env}={raw!r}: must be a positive integer")
    return got


def check(name: str, amount: int, what: str) -> None:
    """Raise if ``amount`` exceeds limit ``name``; ``what`` names the thing being read."""
    limit = value(name)
    if amount > limit:
        lim = LIMITS[name]
        raise LimitExceededError(
            f"{what}: {lim.meaning} is {amount:,}, above the limit of {limit:,}; "
            f"if you trust this input, raise it with {lim.env}"
        )
