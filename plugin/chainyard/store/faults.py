"""Storage faults at the store's own write sites, as one-line StorageFaultError.

The file system can refuse a write at any moment: a full disk (ENOSPC) or quota (EDQUOT), a
file-size limit (EFBIG, ``ulimit -f`` with SIGXFSZ ignored), a read-only mount (EROFS), a
folder without permission (EACCES, EPERM) or a device error (EIO). Each write site of the store
translates these into :class:`~chainyard.errors.StorageFaultError` (exit status 8) naming the
path, the system error and the last commit, which the commit protocol leaves intact (the
commit record is replaced last); temporary files of the failed write are removed. Any other
OSError is not a storage fault and propagates unchanged.
"""

from __future__ import annotations

import asyncio
import errno
import os
from collections.abc import Iterator
from contextlib import contextmanager, suppress
from pathlib import Path

from chainyard.errors import StorageFaultError

__all__ = ["FAULT_ERRNOS", "as_storage_fault", "settle_zarr_writes", "storage_faults"]

#: system errors that mean "the file system refused", by number
FAULT_ERRNOS = frozenset(
    code
    for code in (
        errno.ENOSPC,
        getattr(errno, "EDQUOT", None),
        errno.EFBIG,
        errno.EROFS,
        errno.EACCES,
        errno.EPERM,
        errno.EIO,
    )
    if code is not None
)


def _fault_in(exc: BaseException) -> OSError | None:
    """The storage-fault OSError in ``exc`` or its causes (zarr may wrap it), if any."""
    seen = 0
    cur: BaseException | None = exc
    while cur is not None and seen < 8:
        if isinstance(cur, OSError) and cur.errno in FAULT_ERRNOS:
            return cur
        cur = cur.__cause__ or cur.__context__
        seen += 1
    return None


def as_storage_fault(
    exc: BaseException, path: Path | str, *, committed: int | None
) -> StorageFaultError | None:
    """``exc`` as a StorageFaultError if it is a storage fault, else None.

    Parameters
    ----------
    exc : BaseException
        What the write raised.
    path : Path or str
        What was being written (the OSError's own file name is preferred when it has one).
    committed : int or None
        The store's committed step count (None while a store is being created).
    """
    fault = _fault_in(exc)
    if fault is None:
        return None
    name = errno.errorcode.get(fault.errno or 0, str(fault.errno))
    where = fault.filename or path
    if committed is None:
        after = "nothing was committed and the new store was removed"
    else:
        after = f"the last commit (step {committed}) is intact"
    return StorageFaultError(
        f"{where}: the file system refused the write ({fault.strerror or name} [{name}]); {after}"
    )


def settle_zarr_writes(limit: float = 120.0) -> None:
    """Wait until no write that zarr started is still running (at most ``limit`` seconds).

    zarr writes several files of one call concurrently on its own event loop
    (``asyncio.gather``). When one of them fails, the call raises at once while the others
    are still running in threads; a write finishing later recreates its parent folders. So a
    caller must wait for them before removing what was written, or a removed store can come
    back as a folder of stray metadata. Waits for nothing when zarr has no loop running.
    """
    from zarr.core import sync as zarr_sync  # the loop zarr's synchronous API runs on

    loop = getattr(zarr_sync, "loop", [None])[0]
    if loop is None or loop.is_closed() or not loop.is_running():
        return

    async def _drain() -> None:
        me = asyncio.current_task()
        while others := [t for t in asyncio.all_tasks() if t is not me]:
            await asyncio.wait(others)

    future = asyncio.run_coroutine_threadsafe(_drain(), loop)
    try:
        future.result(timeout=limit)
    except Exception:  # a write that never ends is the caller's fault line, not a new one
        future.cancel()


@contextmanager
def storage_faults(
    path: Path | str, *, committed: int | None, partials: tuple[Path, ...] = ()
) -> Iterator[None]:
    """Translate storage faults raised inside the block; remove ``partials`` if it fails."""
    try:
        yield
    except StorageFaultError:
        raise
    except Exception as exc:
        settle_zarr_writes()
        for tmp in partials:
            with suppress(OSError):
                os.unlink(tmp)
        fault = as_storage_fault(exc, path, committed=committed)
        if fault is None:
            raise
        raise fault from None
