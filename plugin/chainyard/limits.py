"""Documented limits on what foreign input (a store, a pack, a config) can make chainyard
allocate or write.

Each limit has a default and an environment variable that overrides it (a plain integer of
bytes or items). Readers check *declared* sizes against these limits before allocating and
raise :class:`~chainyard.errors.LimitExceededError` naming the limit and its variable.
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
            256 * 2**20,
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
            1_000_000,
            "CHAINYARD_MAX_PACK_MEMBERS",
            "number of members in a pack",
        ),
        Limit(
            "pack_ratio",
            2_000,
            "CHAINYARD_MAX_PACK_RATIO",
            "uncompressed / compressed size of one pack member (zip bombs)",
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
