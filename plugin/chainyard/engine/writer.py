"""Commit writers: encode, write and flush committed rows while the sampler goes on.

Compression (pcodec), hashing and fsync would stop the sampler at every commit if they ran on
its thread. Two writers take them elsewhere:

* :class:`ThreadWriter`, a background thread. Simple and everywhere, but each time the thread
  takes Python's interpreter lock back (after every encode, hash or system call, dozens per
  commit) the sampling thread is made to wait; measured here that costs emcee's loop ~15%.
* :class:`ProcessWriter`, a helper process (:mod:`chainyard.engine.commit_process`) that gets
  each commit's rows through shared memory and a one-line JSON job over a pipe: nothing is
  shared with the sampler but the second core. Linux only (anonymous shared memory, and the
  kernel kills the helper when the sampler dies, so it can never outlive its lock).

:class:`Committer` starts the helper process in the background and uses the thread until
the process is ready (a helper that never gets ready, or whose shared memory cannot be made,
leaves the commits on the thread; one that dies later stops the run with a
:class:`StoreError`). A write the file system refuses (disk full, read-only, file-size limit,
I/O error) reaches the run loop as an ``OSError`` or :class:`StorageFaultError` from either
writer. One commit is in flight at a
time: the next waits for it, so records are written in order, each after its own rows. A
crash at any instant (of either process) leaves the previous commit intact.
"""

from __future__ import annotations

import json
import mmap
import os
import select
import subprocess
import sys
import threading
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.engine.commit import CommitJob, apply_commit
from chainyard.errors import StorageFaultError, StoreError
from chainyard.store import Store

__all__ = ["Committer", "ProcessWriter", "ThreadWriter", "process_writer_available"]

_ALIGN = 64


def process_writer_available() -> bool:
    """True where :class:`ProcessWriter` works (Linux: memfd_create and PR_SET_PDEATHSIG)."""
    return sys.platform.startswith("linux") and hasattr(os, "memfd_create")


class ThreadWriter:
    """Runs commits one at a time on a background thread, with the given store."""

    def __init__(self, store: Store) -> None:
        self._store = store
        self._thread: threading.Thread | None = None
        self._error: BaseException | None = None

    def _run(self, rows: dict[str, NDArray[Any]], job: CommitJob) -> None:
        try:
            apply_commit(self._store, rows, job)
        except BaseException as exc:  # handed to the sampling thread by wait()
            self._error = exc

    def submit(self, job: CommitJob, rows: Mapping[str, NDArray[Any]]) -> None:
        """Start committing ``job`` (``rows`` are copied now) after the previous commit."""
        self.wait()
        own = {k: np.array(v, copy=True) for k, v in rows.items()}
        self._thread = threading.Thread(
            target=self._run, args=(own, job), name="chainyard-commit", daemon=True
        )
        self._thread.start()

    def busy(self) -> bool:
        """True while a commit is in flight (never blocks)."""
        return self._thread is not None and self._thread.is_alive()

    def wait(self, *, raise_error: bool = True) -> None:
        """Block until the commit in flight is done; re-raise its error if ``raise_error``."""
        if self._thread is not None:
            self._thread.join()
            self._thread = None
        if self._error is not None and raise_error:
            error, self._error = self._error, None
            raise error

    def close(self) -> None:
        """Finish the commit in flight (its error, if any, is dropped)."""
        self.wait(raise_error=False)


class ProcessWriter:
    """Runs commits one at a time in a helper process.

    Parameters
    ----------
    store_path : Path
        The store (a directory) the helper opens for writing.
    capacity : int
        Bytes of shared memory for one commit's rows.
    keep_open : list of int
        File descriptors the helper inherits (the store's lock, so that the lock is held
        until both processes are gone).
    """

    def __init__(self, store_path: Path, capacity: int, keep_open: list[int]) -> None:
        self.path = store_path
        self._capacity = max(capacity, mmap.PAGESIZE)
        self._fd = os.memfd_create("chainyard-commit-rows", os.MFD_CLOEXEC)
        try:
            os.ftruncate(self._fd, self._capacity)  # EFBIG under a small RLIMIT_FSIZE
            self._mem = mmap.mmap(self._fd, self._capacity)
        except OSError:
            os.close(self._fd)
            raise
        self._proc = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "chainyard.engine.commit_process",
                str(store_path),
                str(self._fd),
                str(self._capacity),
                str(os.getpid()),
            ],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            pass_fds=[self._fd, *keep_open],
        )
        assert self._proc.stdin is not None and self._proc.stdout is not None
        self._stdin, self._stdout = self._proc.stdin, self._proc.stdout
        self._is_ready = False
        self._pending = False
        self._used = False  # whether any job was sent

    def ready(self) -> bool:
        """True once the helper has opened the store (never blocks)."""
        if self._is_ready:
            return True
        if self._proc.poll() is not None:
            return False
        readable, _, _ = select.select([self._stdout], [], [], 0)
        if readable:
            line = self._stdout.readline()
            self._is_ready = bool(line) and json.loads(line).get("ready") is True
        return self._is_ready

    def _failed(self, what: str) -> StoreError:
        code = self._proc.poll()
        return StoreError(
            f"{self.path}: the commit process {what}"
            + (f" (exit status {code})" if code is not None else "")
            + "; the store keeps its last commit: rerun to continue"
        )

    def submit(self, job: CommitJob, rows: Mapping[str, NDArray[Any]]) -> None:
        """Copy ``rows`` into shared memory and send ``job`` (after the previous commit)."""
        self.wait()
        layout = []
        offset = 0
        for name, values in rows.items():
            if offset + values.nbytes > self._capacity:
                raise RuntimeError("commit rows larger than the shared buffer")
            view: NDArray[Any] = np.ndarray(
                values.shape, values.dtype, buffer=self._mem, offset=offset
            )
            view[...] = values
            del view
            layout.append([name, values.dtype.str, list(values.shape), offset])
            offset += -(-values.nbytes // _ALIGN) * _ALIGN
        message = json.dumps({"op": "commit", "job": job.to_json(), "rows": layout})
        try:
            self._stdin.write(message.encode() + b"\n")
            self._stdin.flush()
        except (BrokenPipeError, OSError):
            raise self._failed("ended unexpectedly") from None
        self._pending = True
        self._used = True

    def busy(self) -> bool:
        """True while a commit is in flight: no reply (or end of the helper) yet; never
        blocks. One job is in flight at a time, so its reply is the only line to come."""
        if not self._pending:
            return False
        readable, _, _ = select.select([self._stdout], [], [], 0)
        return not readable

    def wait(self, *, raise_error: bool = True) -> None:
        """Block until the commit in flight is done; raise its error if ``raise_error``."""
        if not self._pending:
            return
        self._pending = False
        line = self._stdout.readline()
        if not raise_error:
            return
        if not line:
            raise self._failed("ended unexpectedly")
        reply = json.loads(line)
        if "storage_fault" in reply:
            raise StorageFaultError(str(reply["storage_fault"]))
        if "error" in reply:
            raise StoreError(f"{self.path}: commit failed: {reply['error']}")

    def close(self) -> None:
        """Finish the commit in flight, stop the helper and free the shared memory.

        A helper that never got a job has written nothing: it is killed rather than waited
        for (at its low priority on a busy machine, its start-up alone can take seconds).
        """
        self.wait(raise_error=False)
        if not self._used:
            self._proc.kill()
        try:
            self._stdin.write(b'{"op": "exit"}\n')
            self._stdin.close()
        except OSError:
            pass
        try:
            self._proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            self._proc.kill()
            self._proc.wait()
        self._stdout.close()
        self._mem.close()
        os.close(self._fd)


class Committer:
    """The run loop's commit writer: the thread, then the helper process once it is ready.

    Parameters
    ----------
    store : Store
        The store, opened for writing by the run loop.
    use_process : bool
        Start a helper process (:class:`ProcessWriter`) and switch to it when it is ready.
    capacity : int
        Bytes of one commit's rows at most (shared memory size).
    keep_open : list of int
        File descriptors the helper inherits (the store lock).
    """

    def __init__(
        self, store: Store, *, use_process: bool, capacity: int, keep_open: list[int]
    ) -> None:
        self._thread = ThreadWriter(store)
        self._process: ProcessWriter | None = None
        if use_process:
            try:
                self._process = ProcessWriter(store.path, capacity, keep_open)
            except OSError:
                # no shared memory (e.g. RLIMIT_FSIZE below its size: EFBIG): the thread
                # writes the same bytes
                self._process = None
        self._current: ThreadWriter | ProcessWriter = self._thread

    @property
    def kind(self) -> str:
        """``"process"`` once commits go to the helper process, else ``"thread"``."""
        return "process" if self._current is self._process else "thread"

    def submit(self, job: CommitJob, rows: Mapping[str, NDArray[Any]]) -> None:
        """Commit ``job`` with ``rows`` (steps ``[job.origin, job.upto)``), in the background."""
        self._current.wait()
        if self._process is not None and self._current is self._thread and self._process.ready():
            self._current = self._process
        self._current.submit(job, rows)

    def busy(self) -> bool:
        """True while a commit is in flight (never blocks)."""
        return self._current.busy()

    def wait(self, *, raise_error: bool = True) -> None:
        """Block until the commit in flight is done (re-raising its error if asked)."""
        self._current.wait(raise_error=raise_error)

    def close(self) -> None:
        """Finish the commit in flight and stop the helper process."""
        self._current.wait(raise_error=False)
        self._thread.close()
        if self._process is not None:
            self._process.close()
