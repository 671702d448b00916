"""Atomic file replacement and directory flushing (the building blocks of a commit), and
bounded reading of stored files from a store directory or a pack."""

from __future__ import annotations

import json
import os
import stat
from collections.abc import Iterator
from pathlib import Path
from typing import Any

__all__ = [
    "atomic_write_json",
    "fsync_dir",
    "iter_stored",
    "read_stored",
    "stored_size",
]


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


# ---------------------------------------------------------------- bounded reading (both kinds)


def _archive_of(store: Any) -> Any:
    """The open zip file of a packed store (None for a directory)."""
    return getattr(store, "archive", None)


def stored_size(store: Any, key: str) -> int | None:
    """Size in bytes of the stored file ``key`` (declared size for a pack member); None if
    there is no such file."""
    archive = _archive_of(store)
    if archive is not None:
        try:
            return int(archive.getinfo(key).file_size)
        except KeyError:
            return None
    try:
        st = os.stat(Path(store.path) / key)
    except (FileNotFoundError, NotADirectoryError):
        return None
    return int(st.st_size) if stat.S_ISREG(st.st_mode) else None


def iter_stored(store: Any, key: str) -> Iterator[bytes]:
    """The bytes of the stored file ``key`` in blocks of 1 MiB, never past its size at the
    start (a pack member past its declared size raises
    :class:`~chainyard.store.packed.UnsafeMemberError`)."""
    archive = _archive_of(store)
    if archive is not None:
        from chainyard.store.packed import iter_member

        yield from iter_member(archive, archive.getinfo(key), store.path)
        return
    path = Path(store.path) / key
    with open(path, "rb") as f:
        left = os.fstat(f.fileno()).st_size
        while left > 0:
            block = f.read(min(1 << 20, left))
            if not block:
                break
            left -= len(block)
            yield block


def read_stored(store: Any, key: str, limit: str) -> bytes | None:
    """The whole stored file ``key`` after checking its size against the limit named
    ``limit`` (see :mod:`chainyard.limits`); None if there is no such file."""
    from chainyard import limits

    size = stored_size(store, key)
    if size is None:
        return None
    limits.check(limit, size, f"{store.path}: {key}")
    return b"".join(iter_stored(store, key))
