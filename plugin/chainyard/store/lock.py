"""The single-writer lock of a store."""

from __future__ import annotations

from pathlib import Path

from filelock import FileLock, Timeout

from chainyard.errors import StoreLockedError

__all__ = ["lock_path", "writer_lock"]


def lock_path(store_path: Path) -> Path:
    """The lock file guarding ``store_path``: a sibling ``.<name>.lock``.

    It sits beside the store so that discarding or renaming the store never drops the lock.
    The lock is an OS file lock: the kernel releases it when the holder dies, so a killed
    writer never leaves a stale lock behind.
    """
    return store_path.parent / f".{store_path.name}.lock"


def writer_lock(store_path: Path) -> FileLock:
    """Acquire the write lock of a store without waiting.

    Raises
    ------
    StoreLockedError
        If another process holds it.
    """
    path = lock_path(store_path)
    path.parent.mkdir(parents=True, exist_ok=True)
    lock = FileLock(path, timeout=0)
    try:
        lock.acquire()
    except Timeout:
        raise StoreLockedError(
            f"{store_path}: another process is writing this store (lock {path} is held); "
            "wait for it to finish or stop it"
        ) from None
    return lock
