"""Safe output paths: what chainyard may replace, and publishing a derived store atomically.

chainyard never removes what is not its own. An output folder is replaced only when it holds a
derived chainyard store (group attributes ``chainyard.format`` and ``chainyard.derived``); the
source store, a folder holding it, the current folder (or one holding it), a path inside any
chainyard store, a sampled store and anything else already there are refused with one line
(:class:`~chainyard.errors.StoreError`, exit 4).

A new derived store is written to a temporary sibling ``.NAME.derive-PID.tmp`` under the
output's single-writer lock (:func:`chainyard.store.writer_lock`) and swapped in at the end
(Linux: one ``renameat2(RENAME_EXCHANGE)``; elsewhere: the old store renamed aside, the new one
renamed in, the old one removed). A kill at any instant leaves the previous store or the new
one complete (in the two-rename fallback, the old one may be left complete under its ``.old``
name); temporary siblings left by killed derives are removed by the next derive of the same
output, and only those names.
"""

from __future__ import annotations

import ctypes
import errno
import json
import os
import re
import shutil
from collections.abc import Iterator
from contextlib import contextmanager, suppress
from pathlib import Path

from chainyard import testhooks
from chainyard.errors import StorageFaultError, StoreError
from chainyard.store import writer_lock
from chainyard.store.files import fsync_dir
from chainyard.store.layout import ATTRS_KEY, FORMAT_NAME

__all__ = ["check_record_path", "publish_derived", "store_kind"]

#: zarr.json files larger than this are not read to classify a folder (not a store of ours)
_MAX_GROUP_JSON = 16 * 1024 * 1024

_AT_FDCWD = -100
_RENAME_NOREPLACE = 1
_RENAME_EXCHANGE = 2


def store_kind(path: Path) -> str | None:
    """``"derived"``, ``"sampled"`` or ``"zarr"`` for a store folder at ``path``; else None.

    Reads only the group's ``zarr.json`` (JSON, bounded size); never opens arrays.
    """
    meta = path / "zarr.json"
    try:
        if not path.is_dir() or path.is_symlink() or not meta.is_file():
            return None
        if meta.stat().st_size > _MAX_GROUP_JSON:
            return "zarr"
        doc = json.loads(meta.read_bytes())
    except (OSError, ValueError):
        return "zarr" if meta.exists() else None
    attrs = doc.get("attributes") if isinstance(doc, dict) else None
    ours = attrs.get(ATTRS_KEY) if isinstance(attrs, dict) else None
    if not isinstance(ours, dict) or ours.get("format") != FORMAT_NAME:
        return "zarr"
    return "derived" if ours.get("derived") else "sampled"


def _enclosing_store(path: Path) -> Path | None:
    """The nearest folder above ``path`` (resolved) that is a chainyard store, if any."""
    for parent in path.parents:
        if store_kind(parent) in ("derived", "sampled"):
            return parent
    return None


def _refuse(out: Path, why: str) -> StoreError:
    return StoreError(f"{out}: refusing to write the derived store there: {why}")


def _check_target(out: Path, source: Path | None) -> Path:
    """The resolved output path, after refusing the places that must never be replaced."""
    target = out.resolve()
    cwd = Path.cwd().resolve()
    if source is not None:
        src = source.resolve()
        if target == src:
            raise _refuse(out, "it is the source store")
        if target in src.parents:
            raise _refuse(out, f"it holds the source store {source}")
        if src in target.parents:
            raise _refuse(out, f"it is inside the source store {source}")
    if target == cwd:
        raise _refuse(out, "it is the current folder")
    if target in cwd.parents:
        raise _refuse(out, "it holds the current folder")
    home = _enclosing_store(target)
    if home is not None:
        raise _refuse(out, f"it is inside the chainyard store {home}")
    return target


def _check_existing(out: Path, target: Path) -> None:
    """Refuse anything at ``target`` except a derived chainyard store."""
    if not os.path.lexists(target):
        return
    kind = store_kind(target)
    if kind == "derived":
        return
    if kind == "sampled":
        why = "it is a sampled store, not a derived one"
    elif target.is_dir():
        why = "it exists and is not a derived chainyard store"
    else:
        why = "a file of that name exists"
    raise _refuse(out, f"{why} (only a derived store is replaced; choose another path)")


def _leftover_pattern(target: Path) -> re.Pattern[str]:
    return re.compile(rf"\.{re.escape(target.name)}\.derive-\d+\.(tmp|old)")


def _remove(path: Path) -> None:
    if path.is_symlink() or path.is_file():
        path.unlink(missing_ok=True)
    elif path.exists():
        shutil.rmtree(path)


def _clean_leftovers(target: Path) -> None:
    """Remove temporary siblings of ``target`` left by killed derives (lock held)."""
    pattern = _leftover_pattern(target)
    try:
        names = os.listdir(target.parent)
    except FileNotFoundError:
        return
    for name in names:
        if pattern.fullmatch(name):
            _remove(target.parent / name)


def _renameat2(src: Path, dst: Path, flags: int) -> bool:
    """``renameat2(src, dst, flags)``; False where the system call is unavailable."""
    try:
        fn = ctypes.CDLL(None, use_errno=True).renameat2
    except (AttributeError, OSError):
        return False
    res = fn(_AT_FDCWD, os.fsencode(src), _AT_FDCWD, os.fsencode(dst), ctypes.c_uint(flags))
    if res == 0:
        return True
    err = ctypes.get_errno()
    if err in (38, 22, 95):  # ENOSYS, EINVAL, EOPNOTSUPP: not offered by this file system
        return False
    raise OSError(err, os.strerror(err), str(dst))


def _swap_in(tmp: Path, target: Path) -> None:
    """Put the finished store ``tmp`` at ``target``; remove the store it replaces."""
    old = None
    if os.path.lexists(target):
        if _renameat2(tmp, target, _RENAME_EXCHANGE):
            old = tmp  # now holds the replaced store
        else:
            old = tmp.with_suffix(".old")
            os.rename(target, old)
            os.rename(tmp, target)
    elif not _renameat2(tmp, target, _RENAME_NOREPLACE):
        os.rename(tmp, target)
    fsync_dir(target.parent)
    if old is not None:
        _remove_quietly(old)  # the new store is in place; a leftover goes with the next derive


def _remove_quietly(path: Path) -> None:
    """Remove ``path`` if possible (a temporary sibling; the next derive retries)."""
    with suppress(OSError):
        _remove(path)


#: errno -> what the file system refused (the faults reported with exit 8)
_FAULTS = {
    errno.ENOSPC: "no space left on the device",
    errno.EDQUOT: "disk quota exceeded",
    errno.EFBIG: "file too large for the file-size limit",
    errno.EROFS: "read-only file system",
    errno.EIO: "input/output error",
    errno.EACCES: "permission denied",
    errno.EPERM: "operation not permitted",
}


def _storage_fault(exc: BaseException, out: Path) -> StorageFaultError | None:
    """A one-line StorageFaultError naming ``out`` for a file-system refusal; else None."""
    if isinstance(exc, StorageFaultError):  # raised by the store for its temporary copy
        cause = exc.__cause__ or exc.__context__
        if not isinstance(cause, OSError) or cause.errno not in _FAULTS:
            return StorageFaultError(f"{out}: {exc}")
        exc = cause
    if not isinstance(exc, OSError) or exc.errno not in _FAULTS:
        return None
    name = errno.errorcode.get(exc.errno, str(exc.errno))
    return StorageFaultError(
        f"{out}: the file system refused while writing the derived store: "
        f"{_FAULTS[exc.errno]} ({name}); nothing was replaced and the temporary copy was removed"
    )


@contextmanager
def publish_derived(out: Path, *, source: Path | None) -> Iterator[Path]:
    """Write a derived store to a temporary sibling of ``out``, then swap it in.

    Parameters
    ----------
    out : Path
        Where the derived store goes (as the user typed it; messages use it).
    source : Path or None
        The store it is derived from (refused as output, with its parents and contents).

    Yields
    ------
    Path
        The temporary folder to create the new store in (does not exist yet).

    Raises
    ------
    StoreError
        If ``out`` is refused (exit 4).
    StoreLockedError
        If another process is writing ``out`` (exit 6).
    StorageFaultError
        If the file system refuses a write (exit 8); the previous store is left as it was.
    """
    target = _check_target(out, source)
    _check_existing(out, target)  # before the lock file is made beside it; again under it
    with writer_lock(target):
        _clean_leftovers(target)
        _check_existing(out, target)
        tmp = target.parent / f".{target.name}.derive-{os.getpid()}.tmp"
        try:
            yield tmp
            testhooks.instant("derive-before-publish")
            _swap_in(tmp, target)
        except BaseException as exc:
            _remove_quietly(tmp)
            fault = _storage_fault(exc, out)
            if fault is not None:
                raise fault from None
            raise


def check_record_path(path: Path, what: str) -> None:
    """Refuse a record output path that is a store or lies inside one (exit 4).

    Parameters
    ----------
    path : Path
        The JSON record to write.
    what : str
        The option that named it (``--out``, ``--json``), for the message.
    """
    target = path.resolve()
    if store_kind(target) is not None:
        raise StoreError(f"{path}: {what} is a store; a record is written as a file beside it")
    home = _enclosing_store(target)
    if home is not None:
        raise StoreError(f"{path}: {what} is inside the store {home}; write the record elsewhere")
