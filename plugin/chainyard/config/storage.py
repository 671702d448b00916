"""Config section for how the draws are stored and committed (chunks, commits, codec)."""

from __future__ import annotations

from typing import Literal

from pydantic import (
    Field,
)

from chainyard.config._base import _Strict


class StorageSpec(_Strict):
    """How draws are stored and committed."""

    chunk_steps: int = Field(
        default=1000, ge=1, description="Steps per stored chunk (zarr chunk length)."
    )
    commit_every_steps: int = Field(
        default=2000, ge=1, description="Commit at least every this many steps."
    )
    commit_every_seconds: float = Field(
        default=30.0, gt=0, description="Commit at least every this many seconds (wall time)."
    )
    codec: Literal["pcodec", "zstd", "blosc_zstd", "lz4", "none"] = Field(
        default="pcodec",
        description=(
            "Lossless codec for the float arrays. pcodec stores about 30 bytes per 10-D draw "
            "(raw: 80); zstd about 32 and faster to write; none stores raw bytes."
        ),
    )
    level: int | None = Field(
        default=None,
        ge=0,
        le=22,
        description=(
            "Codec level; None: the codec's default. Allowed: pcodec 0-12, zstd 0-22, "
            "blosc_zstd and lz4 0-9; none takes no level."
        ),
    )
    fsync: bool = Field(
        default=True,
        description="Flush every commit to disk before it counts (survives power loss).",
    )
    commit_writer: Literal["auto", "process", "thread"] = Field(
        default="auto",
        description=(
            "Where commits are encoded and written while sampling goes on: 'process', a "
            "helper process (no contention with the sampler for Python's interpreter lock; "
            "Linux only); 'thread', a background thread; 'auto', the process on Linux for runs "
            "of at least 5,000 more steps, else the thread. The stored bytes are the same."
        ),
    )


#: highest level each codec accepts (None: the codec takes no level)
CODEC_MAX_LEVEL: dict[str, int | None] = {
    "pcodec": 12,
    "zstd": 22,
    "blosc_zstd": 9,
    "lz4": 9,
    "none": None,
}
