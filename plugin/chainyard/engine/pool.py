"""Evaluating the walkers' log-probabilities in worker processes (``sample --workers``).

Each batch the sampler asks for (a whole ensemble, or the half an ensemble move updates) is
cut into contiguous slices (one per worker, or up to ``SLICES_PER_WORKER`` for a costly
non-vectorised model); each free worker evaluates the next slice with its own
guarded model (loaded once, from the run's paths) and the answers are put back together in
walker order. Every value comes from the same function on the same row, so the draws are
bitwise those of a serial run (for a vectorised model: as long as a row's value does not
depend on which other rows share its call, as with row-wise array code). Errors are those of
a serial run: the first walker in walker order whose call failed, with the same line; the
NaN/+inf check runs on the whole batch.

The worker count decides nothing about the draws, so it is not part of a store's identity:
changing it never restarts a store or reruns a workflow step.

``workers="auto"`` times the first few model calls in this process and starts the pool only
where the saving outweighs starting the workers and passing rows to them
(:func:`pool_pays`); otherwise the run stays serial and the log says so in one line.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.config import RunConfig
from chainyard.engine.executor import Executor, SliceTask, WorkerSpec
from chainyard.engine.processes import ProcessExecutor
from chainyard.errors import ConfigError, ModelError

__all__ = [
    "MAX_WORKERS",
    "WorkerPool",
    "available_cpus",
    "cap_workers",
    "parse_workers",
    "pool_pays",
    "worker_pool",
]

#: seconds to start the workers and load the model in them (measured on the development
#: machine, 2 cores, loaded: 0.2-1.2 s; see tests/benchmarks/RESULTS.md)
WORKER_START_SECONDS = 0.75
#: seconds one pooled call adds (slicing, pipes, waking the workers; measured 0.1-0.3 ms)
CALL_OVERHEAD_SECONDS = 3e-4
#: a batch for a non-vectorised model is cut into up to this many slices per worker,
#: handed out as workers become free: a worker slowed down by other jobs on the machine then
#: holds up the batch by one small slice only. A vectorised model gets one slice per worker
#: (each call has its own fixed cost).
SLICES_PER_WORKER = 4
#: ... as long as each slice carries at least this many times a slice's round trip of work
SLICE_WORK_FACTOR = 20
#: seconds one slice's round trip to a worker costs (measured 0.1 ms, 2 cores)
SLICE_ROUND_TRIP_SECONDS = 1e-4
#: model calls per step (an ensemble move evaluates each half of the walkers in turn)
CALLS_PER_STEP = 2
#: the pool must make the run at least this much faster to be chosen by "auto"
REQUIRED_SPEEDUP = 1.25
#: "auto" times this many calls (or calls for this many seconds) before choosing
AUTO_TIMED_CALLS = 3
AUTO_TIMING_SECONDS = 0.3
#: larger ``--workers`` or ``--cpus`` values are refused (exit 2): a typo, not a machine
MAX_WORKERS = 1024


def available_cpus() -> int:
    """The CPUs this process may run on (its affinity mask, e.g. a SLURM allocation)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def parse_workers(value: int | str) -> int | None:
    """``workers`` as a count, or None for ``"auto"``.

    Raises
    ------
    ConfigError
        If it is neither a whole number >= 1 nor ``"auto"``.
    """
    if isinstance(value, str):
        if value.strip().lower() == "auto":
            return None
        if value.strip().isdigit():
            value = int(value)
    if isinstance(value, int) and not isinstance(value, bool) and 1 <= value <= MAX_WORKERS:
        return value
    raise ConfigError(
        f"workers: must be a whole number from 1 to {MAX_WORKERS} or 'auto', got {value!r}"
    )


def cap_workers(count: int | None, cpus: int | None, say: Callable[[str], None]) -> int | None:
    """``count`` capped at ``cpus`` (given) or the CPUs available, saying so in one line.

    More processes than CPUs only compete for them (and thousands exhaust the process table).
    ``None`` (``auto``) is returned as is: it is capped by the pool itself.
    """
    if count is None:
        return None
    limit = cpus if cpus is not None else available_cpus()
    if count <= limit:
        return count
    where = f"--cpus {cpus}" if cpus is not None else f"the {limit} CPU(s) available"
    say(f"workers: {count} asked for, capped at {limit} ({where})")
    return limit


def pool_pays(seconds_per_walker: float, walkers: int, steps: int, workers: int) -> bool:
    """Whether ``workers`` processes would make a run at least ``REQUIRED_SPEEDUP`` faster.

    Serial: ``steps * walkers * c``. Pooled: ``WORKER_START_SECONDS + steps * walkers * c /
    workers + steps * CALLS_PER_STEP * CALL_OVERHEAD_SECONDS`` (a simple cost model; common
    practice, no source).
    """
    if workers < 2:
        return False
    work = steps * walkers * seconds_per_walker
    pooled = WORKER_START_SECONDS + work / workers + steps * CALLS_PER_STEP * CALL_OVERHEAD_SECONDS
    return pooled * REQUIRED_SPEEDUP < work


def _slices(n: int, k: int) -> list[tuple[int, int]]:
    """``k`` contiguous, nearly equal ``[start, stop)`` ranges covering ``n`` rows."""
    base, extra = divmod(n, k)
    out, start = [], 0
    for j in range(k):
        stop = start + base + (1 if j < extra else 0)
        out.append((start, stop))
        start = stop
    return out


def _per_walker(seconds: float) -> str:
    return f"{seconds * 1e6:.3g} us" if seconds < 1e-3 else f"{seconds * 1e3:.3g} ms"


class WorkerPool:
    """Answers a :class:`~chainyard.model.LoadedModel`'s calls through worker processes.

    Parameters
    ----------
    spec : WorkerSpec
        How a worker loads the model.
    workers : int or None
        Worker count, or None (``auto``: up to ``cpus``, only where it pays).
    cpus : int
        CPUs the run may use: caps ``auto``'s count; BLAS/OpenMP threads per worker are
        ``max(1, cpus // workers)``.
    walkers, steps : int
        The run's walkers and (at most) steps to go, for ``auto``'s estimate.
    say : callable
        Writes one log line.
    make_executor : callable, optional
        ``make_executor(workers, threads) -> Executor`` (default: local processes).
    where : str, optional
        Where the workers run, for the log (default: local worker processes).
    """

    def __init__(
        self,
        spec: WorkerSpec,
        workers: int | None,
        cpus: int,
        walkers: int,
        steps: int,
        say: Callable[[str], None],
        make_executor: Callable[[int, int], Executor] = ProcessExecutor,
        where: str | None = None,
    ) -> None:
        self.spec = spec
        self.where = where
        self.size = workers if workers is not None else cpus
        self.threads = max(1, cpus // self.size)
        self.walkers = walkers
        self.steps = steps
        self.say = say
        self.make_executor = make_executor
        self.executor: Executor | None = None
        self._timings: list[float] = []  # seconds per walker of the calls timed by "auto"
        self._timed = 0.0
        #: seconds of one model call per walker (timed by "auto", then from pooled batches)
        self._row_seconds: float | None = None
        if workers is None and self.size < 2:
            self.mode = "serial"
            say(f"workers auto: {cpus} CPU available; evaluating the model in this process")
        else:
            self.mode = "timing" if workers is None else "start"

    # ------------------------------------------------------------------ calls
    def evaluate(self, model: Any, thetas: NDArray[np.float64]) -> NDArray[np.float64]:
        """What ``model(thetas)`` returns in a serial run, computed by the workers."""
        n = thetas.shape[0]
        if self.mode == "serial" or n < 2:
            return model.evaluate_serial(thetas)  # type: ignore[no-any-return]
        if self.mode == "timing":
            return self._timed_call(model, thetas)
        if self.mode == "start":
            self._start(model)
            return self.evaluate(model, thetas)
        assert self.executor is not None
        k = min(self.size * self._slices_per_worker(model, n), n)
        tasks = [SliceTask(a, thetas[a:b], n, model.step) for a, b in _slices(n, k)]
        t0 = time.perf_counter()
        outcomes = self.executor.run(tasks)
        # the batch's wall time spread over the rows each worker had (an upper bound)
        self._row_seconds = (time.perf_counter() - t0) * min(self.size, k) / n
        for o in outcomes:
            if o.error is not None:  # the first failing slice holds the first failing walker
                raise ModelError(o.error)
        parts = [o.values for o in outcomes]
        out = np.concatenate(parts) if len(parts) > 1 else parts[0]  # type: ignore[arg-type]
        return model.check_rows(thetas, out)  # type: ignore[no-any-return]

    def _slices_per_worker(self, model: Any, n: int) -> int:
        """1 for a vectorised model or cheap rows, up to ``SLICES_PER_WORKER`` otherwise."""
        c = self._row_seconds
        if model.vectorized or c is None:
            return 1
        work = c * n / self.size  # seconds of model calls per worker in this batch
        k = int(work / (SLICE_WORK_FACTOR * SLICE_ROUND_TRIP_SECONDS))
        return max(1, min(SLICES_PER_WORKER, k))

    def _timed_call(self, model: Any, thetas: NDArray[np.float64]) -> NDArray[np.float64]:
        t0 = time.perf_counter()
        out = model.evaluate_serial(thetas)
        seconds = time.perf_counter() - t0
        self._timings.append(seconds / thetas.shape[0])
        self._timed += seconds
        if len(self._timings) >= AUTO_TIMED_CALLS or self._timed >= AUTO_TIMING_SECONDS:
            c = self._row_seconds = min(self._timings)
            if pool_pays(c, self.walkers, self.steps, self.size):
                self.say(
                    f"workers auto: a model call takes {_per_walker(c)} per walker; "
                    f"evaluating in {self.size} worker processes"
                )
                self.mode = "start"
            else:
                self.mode = "serial"
                model.parallel = None  # later calls go straight to the model
                self.say(
                    f"workers auto: a model call takes {_per_walker(c)} per walker, too little "
                    f"for {self.size} worker processes to pay off; evaluating in this process"
                )
        return out  # type: ignore[no-any-return]

    def _start(self, model: Any) -> None:
        executor = self.make_executor(self.size, self.threads)
        try:
            executor.start(self.spec)
        except ModelError as exc:
            if self.mode == "start" and self._timings:  # chosen by "auto": carry on serially
                self.mode = "serial"
                self.say(f"workers auto: {exc}; evaluating in this process")
                return
            raise
        self.executor = executor
        self.mode = "pooled"
        self.say(
            f"evaluating the model {self.where}"
            if self.where
            else f"evaluating the model in {self.size} worker processes "
            f"(BLAS/OpenMP threads capped at {self.threads} per worker)"
        )

    def close(self) -> None:
        """Stop the workers (idempotent)."""
        if self.executor is not None:
            self.executor.close()
            self.executor = None
        if self.mode == "pooled":
            self.mode = "closed"


@contextmanager
def worker_pool(
    model: Any,
    config: RunConfig,
    workers: int | str,
    cpus: int | None,
    say: Callable[[str], None],
) -> Iterator[None]:
    """Evaluate ``model``'s calls in worker processes inside the block (none for 1 worker).

    Workers start at the first call that needs them and stop when the block ends, however
    it ends (the workers also die with this process, see :mod:`chainyard.engine.processes`).
    ``workers="dask://HOST:PORT"`` (or ``"dask://"``, the address from
    ``DASK_SCHEDULER_ADDRESS``) evaluates on the workers of an existing Dask cluster
    (:mod:`chainyard.engine.dask_executor`).
    """
    spec = WorkerSpec(config.normalised(), str(config.base_dir), config.source)
    if isinstance(workers, str) and workers.strip().lower().startswith("dask://"):
        from chainyard.engine.dask_executor import DaskExecutor, scheduler_address

        executor = DaskExecutor(scheduler_address(workers))
        size = executor.connect()
        pool = WorkerPool(
            spec,
            size,
            size,
            config.sampler.walkers,
            config.sampler.steps,
            say,
            make_executor=lambda _size, _threads: executor,
            where=f"on the Dask cluster at {executor.address} ({size} workers)",
        )
        model.parallel = pool
        try:
            yield
        finally:
            model.parallel = None
            pool.close()
            executor.close()
        return
    count = parse_workers(workers)
    if count == 1:
        yield
        return
    if cpus is not None and (
        isinstance(cpus, bool) or not isinstance(cpus, int) or not 1 <= cpus <= MAX_WORKERS
    ):
        raise ConfigError(f"cpus: must be a whole number from 1 to {MAX_WORKERS}, got {cpus!r}")
    count = cap_workers(count, cpus, say)
    if count == 1:
        yield
        return
    pool = WorkerPool(
        spec,
        count,
        cpus or available_cpus(),
        config.sampler.walkers,
        config.sampler.steps,
        say,
    )
    if pool.mode != "serial":
        model.parallel = pool
    try:
        yield
    finally:
        model.parallel = None
        pool.close()
