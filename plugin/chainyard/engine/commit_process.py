"""The commit helper process: applies commit jobs sent by the run loop (see engine.writer).

Started as ``python -m chainyard.engine.commit_process STORE MEM_FD MEM_SIZE PARENT_PID``.
Each line on standard input is a JSON job ``{"op": "commit", "job": {...}, "rows": [[name,
dtype, shape, offset], ...]}`` whose rows lie in the shared memory ``MEM_FD``; each reply is
one JSON line (``{"ok": true}``, ``{"storage_fault": "PATH: ERROR"}`` when the file system
refused a write, or ``{"error": "..."}``). ``{"op": "exit"}`` or the end of
input stops it. It ignores SIGINT and SIGTERM (the run loop decides when to stop and
commits first), runs at a lower scheduling priority than the sampler, and is killed by the
kernel the moment the run loop's process dies, so it never writes to a store whose lock has
been released.
"""

from __future__ import annotations

import contextlib
import ctypes
import json
import mmap
import os
import signal
import sys
from typing import Any

import numpy as np

_PR_SET_PDEATHSIG = 1


def _die_with_parent(parent: int) -> None:
    libc = ctypes.CDLL(None, use_errno=True)
    if libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0) != 0:
        raise OSError(ctypes.get_errno(), "prctl(PR_SET_PDEATHSIG) failed")
    if os.getppid() != parent:  # the parent died before the request took effect
        os._exit(1)


def _send(message: dict[str, Any]) -> None:
    sys.stdout.buffer.write(json.dumps(message).encode() + b"\n")
    sys.stdout.buffer.flush()


def _fault_text(exc: Exception) -> str:
    """One line naming the path and the system error of a refused write."""
    if isinstance(exc, OSError):
        import errno

        name = errno.errorcode.get(exc.errno or 0, str(exc.errno))
        return f"{exc.filename or '?'}: the file system refused ({exc.strerror or exc} [{name}])"
    return str(exc).splitlines()[0] if str(exc) else type(exc).__name__


def main(argv: list[str]) -> int:
    """Serve commit jobs until told to stop; see the module docstring."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    # subprocess restores SIGXFSZ's default (kill) in children: a write past ``ulimit -f``
    # must fail with EFBIG and be reported instead
    signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    path, fd, size, parent = argv
    _die_with_parent(int(parent))
    with contextlib.suppress(OSError):  # competing for a core, the sampler goes first
        os.nice(10)

    from chainyard.engine.commit import CommitJob, apply_commit
    from chainyard.errors import StorageFaultError
    from chainyard.store import Store

    mem = mmap.mmap(int(fd), int(size))
    store = Store.open(path, writable=True)
    _send({"ready": True})
    for line in sys.stdin.buffer:
        message = json.loads(line)
        if message.get("op") != "commit":
            break
        try:
            rows = {
                name: np.frombuffer(
                    mem, dtype=np.dtype(dtype), count=int(np.prod(shape)), offset=offset
                ).reshape(shape)
                for name, dtype, shape, offset in message["rows"]
            }
            apply_commit(store, rows, CommitJob.from_json(message["job"]))
            del rows
            _send({"ok": True})
        except (OSError, StorageFaultError) as exc:  # the file system refused
            _send({"storage_fault": _fault_text(exc)})
        except Exception as exc:  # reported to the run loop, which raises it there
            _send({"error": f"{type(exc).__name__}: {exc}"})
    # every commit is on disk and answered: leave at once, without the interpreter's
    # teardown (tens of milliseconds the run loop would wait for, the lock still held)
    sys.stdout.flush()
    os._exit(0)


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
