"""The single-writer lock of a store.

The lock is an OS file lock on a sibling file ``.<name>.lock`` of the store's *real* location:
the store path is resolved first (every symlink, ``..`` and relative part), so every alias of
one store folder (a symlink to the store, a symlink to a parent folder, a relative or ``..``
path) takes the same lock. When the store path itself is a symlink, the lock guards the store
it points to and sits beside that target (a dangling symlink is followed to where the store
would be created). The store folder itself is locked too, once it exists
(:meth:`StoreLock.cover_folder`): a folder reached through another mount (a bind mount of the
store or of a folder above it) is the same folder to the kernel, so a second writer there is
refused as well. Where a file system cannot lock a folder (some network file systems), only
the sibling file guards the store.

The kernel releases the lock when its holder dies, so a killed writer never leaves a stale
lock behind. The lock belongs to the open file, so a helper process that inherits the lock's
file descriptor (:attr:`StoreLock.fd`) keeps the store locked as long as it runs.
"""

from __future__ import annotations

import errno
import os
import sys
from pathlib import Path
from types import TracebackType
from typing import Any

from chainyard.errors import StorageFaultError, StoreLockedError

__all__ = ["StoreLock", "lock_path", "real_store_path", "writer_lock"]


def real_store_path(store_path: str | Path) -> Path:
    """The store's real location: ``store_path`` made absolute with every symlink resolved."""
    return Path(os.path.realpath(Path(store_path)))


def lock_path(store_path: str | Path) -> Path:
    """The lock file guarding ``store_path``: ``.<name>.lock`` beside its real location.

    It sits beside the store (not inside it) so that discarding or renaming the store never
    drops the lock.
    """
    real = real_store_path(store_path)
    return real.parent / f".{real.name}.lock"


class StoreLock:
    """The write lock of one store, taken by ``with`` exactly once and always released.

    Parameters
    ----------
    store_path : str or Path
        The store, as the user typed it (used in messages; the lock itself is keyed by the
        real location, see :func:`lock_path`).

    Attributes
    ----------
    path : Path
        The lock file.
    fd : int or None
        While held: the OS file descriptor that holds the lock (a child process that
        inherits it keeps the store locked); None when not held.
    folder_fd : int or None
        While held and the store folder exists: a descriptor of the store folder itself,
        locked the same way (see :meth:`cover_folder`); None otherwise.
    read_only : bool
        True after entering when the lock file is missing and its folder is on a read-only
        file system: no process can write the store there, so none is taken (``fd`` stays
        None); any write then fails with StorageFaultError (EROFS).
    """

    def __init__(self, store_path: str | Path) -> None:
        self.store_path = Path(store_path)
        self.path = lock_path(store_path)
        self.fd: int | None = None
        self.folder_fd: int | None = None
        self.read_only = False
        self._fallback: Any = None

    @property
    def held(self) -> bool:
        """True between a successful :meth:`acquire` and :meth:`release`."""
        return self.fd is not None or self._fallback is not None

    def acquire(self) -> None:
        """Take the lock without waiting.

        Raises
        ------
        StoreLockedError
            If another process (or another lock object of this process) holds it.
        StorageFaultError
            If the lock file cannot be created (read-only or full file system, no permission).
        RuntimeError
            If this object already holds the lock (a lock is taken once).
        """
        if self.held:
            raise RuntimeError(f"{self.path}: this lock is already held by this object")
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            if sys.platform == "win32":  # pragma: no cover - no fcntl there
                self._acquire_fallback()
                return
            import fcntl

            fd = self._open()
        except OSError as exc:
            raise StorageFaultError(
                f"{self.path}: cannot create the store's lock file "
                f"({exc.strerror or exc}); nothing was written"
            ) from None
        if fd is None:
            return  # read-only file system: nothing can write the store, no lock needed
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            os.close(fd)
            if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                raise self._locked() from None
            raise StorageFaultError(
                f"{self.path}: cannot lock the store ({exc.strerror or exc}); nothing was written"
            ) from None
        self.fd = fd
        try:
            self.cover_folder()
        except StoreLockedError:
            self.release()
            raise

    @property
    def fds(self) -> list[int]:
        """The descriptors holding the lock (a helper process inherits them all)."""
        return [fd for fd in (self.fd, self.folder_fd) if fd is not None]

    def cover_folder(self) -> None:
        """Lock the store folder itself too (call again after creating or replacing it).

        The kernel knows one folder by its device and inode whatever path or mount reaches
        it, so a writer that came through another mount finds it locked. A folder that does
        not exist yet, or that its file system cannot lock, is left to the sibling lock file.

        Raises
        ------
        StoreLockedError
            If another process holds the folder's lock.
        """
        if self.fd is None or sys.platform == "win32":
            return
        import fcntl

        old, self.folder_fd = self.folder_fd, None
        if old is not None:
            os.close(old)
        try:
            fd = os.open(real_store_path(self.store_path), os.O_RDONLY | os.O_DIRECTORY)
        except OSError:
            return  # missing, or not a folder: nothing to cover (yet)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            os.close(fd)
            if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                raise self._locked(folder=True) from None
            return  # this file system does not lock folders
        self.folder_fd = fd

    def _open(self) -> int | None:
        """A descriptor of the lock file to flock; None on a read-only file system without one.

        An existing lock file that cannot be opened for writing (read-only file system, or
        another user's file) is opened read-only: flock works on any descriptor.
        """
        try:
            return os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            if exc.errno not in (errno.EROFS, errno.EACCES):
                raise
            if self.path.exists():
                return os.open(self.path, os.O_RDONLY)
            if exc.errno == errno.EROFS:
                self.read_only = True
                return None
            raise

    def _acquire_fallback(self) -> None:  # pragma: no cover - Windows only
        from filelock import FileLock, Timeout

        lock = FileLock(self.path, timeout=0)
        try:
            lock.acquire()
        except Timeout:
            raise self._locked() from None
        self._fallback = lock

    def _locked(self, *, folder: bool = False) -> StoreLockedError:
        what = (
            f"its folder {real_store_path(self.store_path)} is locked, perhaps through "
            "another mount"
            if folder
            else f"lock {self.path} is held"
        )
        return StoreLockedError(
            f"{self.store_path}: another process is writing this store ({what}); wait for "
            "it to finish or stop it"
        )

    def release(self) -> None:
        """Give the lock up (nothing happens if it is not held)."""
        self.read_only = False
        folder_fd, self.folder_fd = self.folder_fd, None
        if folder_fd is not None:
            os.close(folder_fd)
        fd, self.fd = self.fd, None
        if fd is not None:
            os.close(fd)  # closing the last descriptor of the open file drops the flock
        fallback, self._fallback = self._fallback, None
        if fallback is not None:  # pragma: no cover - Windows only
            fallback.release(force=True)

    def __enter__(self) -> StoreLock:
        self.acquire()
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.release()

    def __del__(self) -> None:
        if self.fd is not None:
            self.release()


def writer_lock(store_path: str | Path) -> StoreLock:
    """The write lock of a store, to be taken with ``with``::

        with writer_lock(path) as lock:   # acquired here, once; StoreLockedError if held
            ...                           # lock.fd: the descriptor a helper may inherit
        # released here, on any exit

    Nothing is acquired until the ``with`` block is entered.
    """
    return StoreLock(store_path)
