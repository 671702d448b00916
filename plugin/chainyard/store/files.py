"""Atomic file replacement and directory flushing (the building blocks of a commit)."""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

__all__ = ["atomic_write_json", "fsync_dir"]


def atomic_write_json(path: Path, data: Any, *, fsync: bool) -> None:
    """Replace ``path`` by JSON ``data`` atomically (temporary file + rename)."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    text = json.dumps(data, sort_keys=True, indent=1, allow_nan=False)
    with open(tmp, "w") as f:
        f.write(text)
        if fsync:
            f.flush()
            os.fsync(f.fileno())
    os.replace(tmp, path)
    if fsync:
        fsync_dir(path.parent)


def fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
