"""How the command line ends on an error that escaped a command: one line and an exit status.

A file system refusing a write (disk full, quota, file-size limit, read-only, I/O error) ends
in exit 8, a name too long in exit 2, and anything unexpected (a chainyard bug) in one
``chainyard: internal error: ...`` line and exit 70; see :mod:`chainyard.errors` for the exit
codes of user mistakes.
"""

from __future__ import annotations

import errno
import os
import select
import sys
import traceback
from pathlib import Path

INTERNAL_ERROR = 70
STORAGE_FAULT = 8

__all__ = ["INTERNAL_ERROR", "STORAGE_FAULT", "os_error_exit", "report_internal"]

#: errno -> what the file system refused (the safety net for faults the store did not name)
_STORAGE_ERRNOS = {
    errno.ENOSPC: ("no space left on the device", "free some space and rerun"),
    errno.EDQUOT: ("disk quota exceeded", "free some of your quota and rerun"),
    errno.EFBIG: ("file too large for the file-size limit", "raise `ulimit -f` and rerun"),
    errno.EROFS: ("read-only file system", "write somewhere writable"),
    errno.EIO: ("input/output error", "check the disk"),
    errno.EACCES: ("permission denied", "check the permissions"),
    errno.EPERM: ("operation not permitted", "check the permissions"),
}


def _say(line: str) -> None:
    """Print one line to stderr (never raises)."""
    try:
        sys.stderr.write(line.replace("\n", " ") + "\n")
        sys.stderr.flush()
    except (OSError, ValueError):
        pass


def _stdout_broken() -> bool:
    """True if the reader of stdout has gone (the write end of a pipe reports an error)."""
    try:
        poller = select.poll()
        poller.register(sys.stdout.fileno(), select.POLLOUT)
        return any(ev & (select.POLLERR | select.POLLHUP) for _, ev in poller.poll(0))
    except (OSError, ValueError, AttributeError):
        return False


def _quiet_exit_on_broken_pipe() -> int:
    """Point stdout at /dev/null so that the interpreter's final flush stays quiet."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):
        pass
    return 0


def os_error_exit(exc: OSError) -> int | None:
    """One line and exit status for a file-system refusal that escaped; None if not one."""
    if exc.errno == errno.ENAMETOOLONG:  # a path given by the user: bad input
        name = os.fsdecode(exc.filename) if exc.filename is not None else ""
        where = f"{name[:80]}{'...' if len(name) > 80 else ''}: " if name else ""
        _say(f"chainyard: error: {where}file name too long (at most 255 bytes per name)")
        return 2
    known = _STORAGE_ERRNOS.get(exc.errno or 0)
    if known is None:
        return None
    what, hint = known
    name = errno.errorcode.get(exc.errno or 0, str(exc.errno))
    where = f"{os.fsdecode(exc.filename)}: " if exc.filename is not None else ""
    if exc.errno in (errno.EACCES, errno.EPERM) and exc.filename is not None:
        path = Path(os.fsdecode(exc.filename))
        if path.exists() and not os.access(path, os.R_OK):  # a read, not a write
            _say(f"chainyard: error: {where}cannot read it: {what} ({name}); {hint}")
            return 4
    _say(f"chainyard: error: {where}the file system refused: {what} ({name}); {hint}")
    return STORAGE_FAULT


def report_internal(exc: BaseException, command: str, show: bool) -> int:
    """Report a chainyard bug in one line (the traceback first when asked for)."""
    if show:
        traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)
    text = (str(exc).strip().splitlines() or [""])[0]
    _say(
        f"chainyard: internal error: {type(exc).__name__}: {text} "
        f"(in 'chainyard {command}'; run with --traceback or CHAINYARD_TRACEBACK=1 "
        "for the traceback)"
    )
    return INTERNAL_ERROR


def _interrupted_class() -> type[BaseException]:
    """The engine's stop-on-signal exception, imported without emcee where possible."""
    try:
        from chainyard.engine.stopping import Interrupted
    except ImportError:  # pragma: no cover - older engine layout
        from chainyard.engine import Interrupted
    return Interrupted
