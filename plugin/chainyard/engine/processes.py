"""Local worker processes for the pool: a fresh interpreter each, spoken to over pipes.

Each worker is ``python -m chainyard.engine.processes`` started with ``subprocess``: a new
interpreter (like multiprocessing's "spawn" context, but without re-importing the caller's
``__main__``, which under a Snakemake ``script:`` would run the whole job script again). The
environment it starts with caps BLAS/OpenMP threads before numpy is imported. Requests come
on the worker's stdin, answers go on its original stdout (the model's own printing goes to
stderr, like the run's log), framed by :class:`multiprocessing.connection.Connection`:

- parent -> worker: the :class:`~chainyard.engine.executor.WorkerSpec` as JSON, then one
  frame per task: ``<q step (-1: none), offset, total, rows, cols>`` + the rows as float64.
- worker -> parent: ``R`` (ready) or ``E`` + message (the model did not load); then per task
  ``V`` + ``<q rows, cols (0: one value per row)>`` + float64 values, ``M`` + the ModelError
  line, or ``X`` + a traceback (a chainyard bug).

No pickle is used. A worker ignores SIGINT and SIGTERM (the run stops at the next step
boundary and closes the pool) and dies with the run: Linux kills it when the process that
started it ends (``PR_SET_PDEATHSIG``), and everywhere it exits when its request pipe closes.
"""

from __future__ import annotations

import contextlib
import os
import signal
import struct
import subprocess
import sys
import traceback
from collections import deque
from multiprocessing.connection import Connection, wait
from pathlib import Path

import numpy as np

from chainyard.engine.executor import SliceOutcome, SliceTask, WorkerSpec
from chainyard.errors import ModelError

__all__ = ["THREAD_VARIABLES", "ProcessExecutor", "worker_environment"]

#: the environment variables that cap a worker's BLAS/OpenMP threads
THREAD_VARIABLES = (
    "OMP_NUM_THREADS",
    "OPENBLAS_NUM_THREADS",
    "MKL_NUM_THREADS",
    "VECLIB_MAXIMUM_THREADS",
    "NUMEXPR_NUM_THREADS",
)
#: tasks in a worker's pipe at a time (the next is there when it finishes one)
QUEUED_PER_WORKER = 2
#: tasks larger than this (bytes) are queued one at a time (pipes hold 64 KiB on Linux)
PIPE_SAFE_BYTES = 16 * 1024
#: seconds a worker has to exit after its request pipe is closed before it is killed
EXIT_WAIT_SECONDS = 2.0

_TASK = struct.Struct("<qqqqq")
_VALUES = struct.Struct("<qq")
_PARENT_VARIABLE = "CHAINYARD_WORKER_PARENT"


def worker_environment(threads: int) -> dict[str, str]:
    """The environment of a worker: this one, threads capped at ``threads`` (a smaller cap
    already set stays), and chainyard importable."""
    env = dict(os.environ)
    for name in THREAD_VARIABLES:
        current = env.get(name, "")
        keep = current.isdigit() and 0 < int(current) < threads
        env[name] = current if keep else str(threads)
    package_root = str(Path(__file__).resolve().parents[2])
    paths = [package_root] + [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p]
    env["PYTHONPATH"] = os.pathsep.join(dict.fromkeys(paths))
    env[_PARENT_VARIABLE] = str(os.getpid())
    return env


def _signal_name(returncode: int | None) -> str:
    if returncode is None:
        return "still running"
    if returncode < 0:
        with contextlib.suppress(ValueError):
            return f"killed by {signal.Signals(-returncode).name}"
    return f"exit status {returncode}"


class _Worker:
    """One worker process and its two pipe ends."""

    def __init__(self, index: int, env: dict[str, str]) -> None:
        self.index = index
        stderr = None
        with contextlib.suppress(AttributeError, OSError, ValueError):
            sys.stderr.flush()
            stderr = sys.stderr.fileno()  # the run's log, even when redirected in Python
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "chainyard.engine.processes"],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            stderr=stderr,
            env=env,
            close_fds=True,
        )
        assert self.proc.stdin is not None and self.proc.stdout is not None
        self.send = Connection(os.dup(self.proc.stdin.fileno()), readable=False)
        self.recv = Connection(os.dup(self.proc.stdout.fileno()), writable=False)
        self.proc.stdin.close()
        self.proc.stdout.close()

    def lost(self, doing: str) -> ModelError:
        """The one line for a worker that ended while ``doing``."""
        with contextlib.suppress(subprocess.TimeoutExpired):
            self.proc.wait(EXIT_WAIT_SECONDS)
        return ModelError(
            f"worker process {self.index} (pid {self.proc.pid}) ended unexpectedly "
            f"({_signal_name(self.proc.returncode)}) while {doing}: the model crashed the "
            "process or it was killed from outside (e.g. for lack of memory); the store keeps "
            "its last commit and a rerun resumes from it"
        )

    def stop(self) -> None:
        for conn in (self.send, self.recv):
            with contextlib.suppress(OSError):
                conn.close()


class ProcessExecutor:
    """``workers`` local worker processes, each capped at ``threads`` BLAS/OpenMP threads.

    Parameters
    ----------
    workers : int
    threads : int
        Threads per worker (``OMP_NUM_THREADS`` and friends).
    """

    def __init__(self, workers: int, threads: int) -> None:
        self.workers = workers
        self.threads = threads
        self._pool: list[_Worker] = []
        self._broken: ModelError | None = None

    def start(self, spec: WorkerSpec) -> None:
        """Start the workers and wait until each has loaded the model."""
        env = worker_environment(self.threads)
        text = spec.to_json().encode()
        try:
            for k in range(self.workers):
                self._pool.append(_Worker(k, env))
            for w in self._pool:
                w.send.send_bytes(text)
            for w in self._pool:
                try:
                    answer = w.recv.recv_bytes()
                except (EOFError, OSError):
                    raise w.lost("loading the model") from None
                if answer[:1] == b"E":
                    raise ModelError(
                        f"worker process {w.index} could not load the model: "
                        + answer[1:].decode(errors="replace")
                    )
        except BaseException:
            self.close()
            raise

    def run(self, tasks: list[SliceTask]) -> list[SliceOutcome]:
        """Evaluate ``tasks`` on the workers; outcomes in task order.

        Each worker has ``QUEUED_PER_WORKER`` tasks in its pipe and gets the next one as
        each answer comes back: a worker slowed down by other jobs on the machine holds up
        little, and no worker waits for the parent between two tasks.
        """
        if self._broken is not None:
            raise self._broken
        out: list[SliceOutcome | None] = [None] * len(tasks)
        todo = iter(range(len(tasks)))
        queued: dict[Connection, tuple[_Worker, deque[int]]] = {
            w.recv: (w, deque()) for w in self._pool
        }
        lost: ModelError | None = None
        # a second task only where it surely fits in the pipe beside the first: a worker
        # blocked writing a large answer must never wait for a parent blocked writing to it
        small = all(t.thetas.nbytes <= PIPE_SAFE_BYTES for t in tasks)
        depth = QUEUED_PER_WORKER if small else 1

        def give(w: _Worker) -> None:
            nonlocal lost
            i = next(todo, None) if lost is None else None
            if i is None:
                return
            t = tasks[i]
            rows, cols = t.thetas.shape
            head = _TASK.pack(-1 if t.step is None else t.step, t.offset, t.total, rows, cols)
            try:
                w.send.send_bytes(head + np.ascontiguousarray(t.thetas).tobytes())
            except OSError:
                lost = w.lost(_doing(t))
                queued.pop(w.recv, None)
                return
            queued[w.recv][1].append(i)

        try:
            for _ in range(depth):
                for w in self._pool:
                    give(w)
            while any(q for _, q in queued.values()):
                for conn in wait([c for c, (_, q) in queued.items() if q]):
                    w, q = queued[conn]  # type: ignore[index]
                    try:
                        answer = w.recv.recv_bytes()
                    except (EOFError, OSError):
                        lost = lost or w.lost(_doing(tasks[q[0]]))
                        del queued[conn]  # type: ignore[arg-type]
                        continue
                    out[q.popleft()] = _outcome(answer)
                    give(w)
        except BaseException:  # an interrupt while waiting: answers may be left in the pipes
            self._broken = ModelError("the worker pool was interrupted")
            raise
        if lost is not None:
            self._broken = lost
            raise lost
        return out  # type: ignore[return-value]

    def close(self) -> None:
        """Close the request pipes (workers exit), wait a little, then kill what is left."""
        pool, self._pool = self._pool, []
        for w in pool:
            w.stop()
        for w in pool:
            try:
                w.proc.wait(EXIT_WAIT_SECONDS)
            except subprocess.TimeoutExpired:
                w.proc.kill()
                w.proc.wait()


def _doing(task: SliceTask) -> str:
    step = f" at step {task.step}" if task.step is not None else ""
    last = task.offset + task.thetas.shape[0] - 1
    return f"evaluating walkers {task.offset}-{last} of {task.total}{step}"


def _outcome(answer: bytes) -> SliceOutcome:
    kind = answer[:1]
    if kind == b"V":
        rows, cols = _VALUES.unpack_from(answer, 1)
        values = np.frombuffer(answer, dtype=np.float64, offset=1 + _VALUES.size)
        return SliceOutcome(values.reshape((rows, cols) if cols else (rows,)).copy(), None)
    if kind == b"M":
        return SliceOutcome(None, answer[1:].decode(errors="replace"))
    raise RuntimeError("a pool worker failed:\n" + answer[1:].decode(errors="replace"))


# ---------------------------------------------------------------------- the worker side
def _die_with_parent() -> None:
    """Linux: be killed when the parent ends; everywhere: exit if it has already."""
    if sys.platform.startswith("linux"):
        with contextlib.suppress(Exception):
            import ctypes

            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(1, int(signal.SIGKILL))  # PR_SET_PDEATHSIG
    parent = os.environ.get(_PARENT_VARIABLE, "")
    if parent.isdigit() and os.getppid() != int(parent):
        os._exit(0)


def _serve(requests: Connection, answers: Connection) -> None:
    from chainyard.engine.executor import evaluate_task, load_worker_model
    from chainyard.errors import ChainyardError

    try:
        spec = WorkerSpec.from_json(requests.recv_bytes().decode())
    except EOFError:
        return
    try:
        model = load_worker_model(spec)
    except ChainyardError as exc:
        answers.send_bytes(b"E" + " ".join(str(exc).split()).encode())
        return
    answers.send_bytes(b"R")
    while True:
        try:
            frame = requests.recv_bytes()
        except EOFError:
            return
        step, offset, total, rows, cols = _TASK.unpack_from(frame)
        thetas = np.frombuffer(frame, dtype=np.float64, offset=_TASK.size).reshape(rows, cols)
        task = SliceTask(offset, thetas.copy(), total, None if step < 0 else step)
        try:
            outcome = evaluate_task(model, task)
        except BaseException:  # a chainyard bug: the parent reports it
            answers.send_bytes(b"X" + traceback.format_exc().encode())
            continue
        if outcome.error is not None:
            answers.send_bytes(b"M" + outcome.error.encode())
            continue
        values = outcome.values
        assert values is not None
        shape = values.shape
        head = _VALUES.pack(shape[0], shape[1] if values.ndim == 2 else 0)
        answers.send_bytes(b"V" + head + values.tobytes())


def main() -> None:
    """Entry point of a worker process."""
    for s in (signal.SIGINT, signal.SIGTERM):
        signal.signal(s, signal.SIG_IGN)  # the run stops the pool itself
    _die_with_parent()
    requests = Connection(os.dup(0), writable=False)
    answers = Connection(os.dup(1), readable=False)
    devnull = os.open(os.devnull, os.O_RDONLY)
    os.dup2(devnull, 0)
    os.dup2(2, 1)  # the model's printing must not reach the answer pipe
    os.close(devnull)
    with contextlib.suppress(BrokenPipeError, EOFError, ConnectionResetError):
        _serve(requests, answers)  # those errors: the run ended


if __name__ == "__main__":
    main()
