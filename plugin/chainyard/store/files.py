"""Atomic file replacement and directory flushing (the building blocks of a commit), and
bounded reading of stored files from a store directory or a pack."""

from __future__ import annotations

import json
import os
import shutil
import stat
from collections.abc import Iterator
from pathlib import Path
from typing import Any

__all__ = [
    "atomic_write_json",
    "discard_folder",
    "fsync_dir",
    "iter_stored",
    "read_stored",
    "remove_discarded",
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


def _discarded_prefix(path: Path) -> str:
    return f".{path.name}.discarded-"


def discard_folder(path: Path) -> None:
    """Remove the folder ``path`` so that no half-removed folder is ever left *at* ``path``.

    The folder is first renamed to a hidden sibling ``.NAME.discarded-PID`` (one atomic step),
    then deleted. A process killed while deleting leaves only that sibling, which the next
    writer of ``path`` removes (:func:`remove_discarded`); never a store at ``path`` whose
    commit record is gone while its chunk files remain.
    """
    from chainyard.testhooks import instant

    grave = path.with_name(f"{_discarded_prefix(path)}{os.getpid()}")
    if grave.exists():
        shutil.rmtree(grave)
    os.rename(path, grave)
    instant("store-discarding")  # test-only kill point: renamed, not yet deleted
    shutil.rmtree(grave, ignore_errors=True)


def remove_discarded(path: Path) -> None:
    """Delete what an interrupted :func:`discard_folder` of ``path`` left behind (call it
    holding ``path``'s writer lock)."""
    parent, prefix = path.parent, _discarded_prefix(path)
    if not parent.is_dir():
        return
    for entry in parent.iterdir():
        rest = entry.name[len(prefix) :]
        if entry.name.startswith(prefix) and rest.isdigit() and not entry.is_symlink():
            shutil.rmtree(entry, ignore_errors=True)


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
