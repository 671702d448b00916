"""The run loop: create, resume or extend a store, and commit steps as they come.

``sample`` is the only entry point. It validates everything that can be checked before a
byte is written (model, data, initial state), takes the store's single-writer lock, compares
an existing store's identity with the requested run, and then advances the sampler,
committing by step count and by wall time (whichever first). SIGTERM and SIGINT commit the
finished steps before the process exits, so a wall-time limit loses nothing; SIGKILL loses
at most the steps since the last commit.
"""

from __future__ import annotations

import shutil
import signal
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from chainyard.config import RunConfig, config_hash
from chainyard.engine.buffer import StepBuffer
from chainyard.engine.commit import CommitJob
from chainyard.engine.ensemble import EnsembleDriver
from chainyard.engine.identity import describe_differences, run_identity
from chainyard.engine.initial import initial_state
from chainyard.engine.writer import Committer, process_writer_available
from chainyard.errors import ChainyardError, ConfigError, StoreConflictError, StoreError
from chainyard.model import LoadedModel, load_model
from chainyard.progress import Progress
from chainyard.provenance import git_state, host_record, software_versions, utc_now
from chainyard.store import Store, writer_lock
from chainyard.store.layout import ATTRS_KEY, BLOB, COMMIT_FILE, LOG_PROB, POSITION
from chainyard.streams import random_state_to_json, sampler_random_state, spawn_key

__all__ = ["Interrupted", "sample"]

#: pending rows are committed at the latest when they reach this many bytes
MAX_PENDING_BYTES = 128 * 2**20


class Interrupted(BaseException):
    """The run stopped on SIGTERM/SIGINT after committing its finished steps.

    A BaseException (like KeyboardInterrupt) so that a model's ``except Exception`` cannot
    swallow it.
    """

    def __init__(self, signum: int) -> None:
        super().__init__(signal.Signals(signum).name)
        self.signum = signum


class _StopFlag:
    """Set by SIGTERM/SIGINT; the loop stops at the next step boundary and commits.

    A second signal while the flag is set stops at once (without a commit).
    """

    def __init__(self) -> None:
        self.signum: int | None = None

    def handler(self, signum: int, frame: Any) -> None:
        if self.signum is not None:
            raise Interrupted(signum)
        self.signum = signum


@contextmanager
def _stop_on_signals() -> Iterator[_StopFlag]:
    flag = _StopFlag()
    try:
        old = {s: signal.signal(s, flag.handler) for s in (signal.SIGTERM, signal.SIGINT)}
    except ValueError:  # not the main thread: leave signals alone
        yield flag
        return
    try:
        yield flag
    finally:
        for s, h in old.items():
            signal.signal(s, h)


def _is_partial_creation(path: Path) -> bool:
    """True for a store folder a killed process left before its first commit."""
    if not path.is_dir():
        return False
    if (path / COMMIT_FILE).exists():
        return False
    meta = path / "zarr.json"
    if not any(path.iterdir()):
        return True
    try:
        import json

        attrs = json.loads(meta.read_text()).get("attributes", {})
    except (OSError, ValueError):
        return False
    return isinstance(attrs.get(ATTRS_KEY), dict)


def _store_attrs(config: RunConfig, replica: int, identity: dict[str, Any]) -> dict[str, Any]:
    norm = config.normalised()
    return {
        "param_names": list(config.param_names),
        "blob_names": list(config.sampler.blobs),
        "walkers": config.sampler.walkers,
        "replica": replica,
        "seed": config.seed,
        "spawn_key": list(spawn_key(replica, 1)),
        "config": norm,
        "config_hash": config_hash(norm),
        "config_dir": str(config.base_dir),
        "config_source": config.source,
        "identity": identity,
        "provenance": {
            "created_utc": utc_now(),
            "software": software_versions(),
            "host": host_record(),
            "git": git_state(config.base_dir),
        },
    }


def sample(
    config: RunConfig,
    store_path: str | Path,
    replica: int = 0,
    *,
    restart: bool = False,
    progress: str = "auto",
    progress_interval: float = 10.0,
    stream: TextIO | None = None,
) -> Store:
    """Create, resume or extend the store of one replica until it holds ``sampler.steps``.

    Parameters
    ----------
    config : RunConfig
        The validated run configuration.
    store_path : str or Path
        The store directory (created if missing).
    replica : int
        Replica index; selects the independent random stream.
    restart : bool
        Discard an existing store at ``store_path`` and start over.
    progress : {"auto", "bar", "log", "off"}
        Progress display (``auto``: bar on a terminal, log lines otherwise).
    progress_interval : float
        Seconds between progress log lines.
    stream : file, optional
        Where progress goes (default standard error).

    Returns
    -------
    Store
        The store, opened for reading.

    Raises
    ------
    ConfigError, ModelError, StoreError, StoreConflictError, StoreLockedError
        On bad input; an existing store is never altered in that case.
    """
    path = Path(store_path)
    try:
        model = load_model(config)
    except ConfigError as exc:
        raise exc.located(config.source) from None
    identity = run_identity(config, replica, EnsembleDriver.kind)
    label = f"{path.name}"
    with writer_lock(path) as lock:
        if restart and path.exists():
            if not (path / COMMIT_FILE).exists() and not _is_partial_creation(path):
                raise StoreError(f"{path}: exists and is not a chainyard store; not removing it")
            shutil.rmtree(path)
        if _is_partial_creation(path):
            shutil.rmtree(path)
        if path.exists():
            store = Store.open(path, writable=True)
            if store.attrs.get("derived") is not None:
                raise StoreError(
                    f"{path}: is a derived (trimmed or thinned) store and cannot be sampled "
                    "into; give the original store or a new path"
                )
            _check_identity(store, identity, path)
            if store.steps_done >= config.sampler.steps:
                reporter = Progress(
                    config.sampler.steps,
                    store.steps_done,
                    mode=progress,
                    stream=stream,
                    label=label,
                )
                reporter.message(
                    f"already complete ({store.steps_done:,} steps committed, "
                    f"{config.sampler.steps:,} requested); nothing to do"
                )
                return Store.open(path)
            kind = "extend" if store.steps_done >= _stored_steps(store) else "resume"
            _refresh_config(store, config)
        else:
            if path.is_file():
                raise StoreError(f"{path}: exists and is a file, not a store directory")
            try:
                store = _create(config, model, replica, identity, path)
            except ConfigError as exc:
                raise exc.located(config.source) from None
            kind = "start"
        with _stop_on_signals() as stop:
            try:
                _advance(
                    store,
                    config,
                    model,
                    kind,
                    stop,
                    progress,
                    progress_interval,
                    stream,
                    label,
                    _lock_fds(lock),
                )
            except ChainyardError:
                if kind == "start" and Store.open(path).steps_done == 0:
                    shutil.rmtree(path)  # nothing of value was made by this failed start
                raise
    return Store.open(path)


def _lock_fds(lock: Any) -> list[int]:
    """The OS file descriptor holding the store lock, if the lock object exposes it."""
    fd = getattr(getattr(lock, "_context", None), "lock_file_fd", None)
    return [fd] if isinstance(fd, int) else []


#: the run loop's bookkeeping (commit due? progress? stop signal?) runs about this often (s)
CHECK_SECONDS = 0.005
#: ... but at least every this many steps
MAX_CHECK_STRIDE = 256

#: "auto" commits in a helper process for runs with at least this many steps to go
PROCESS_WRITER_MIN_STEPS = 5000


def _use_process(config: RunConfig, steps_to_go: int) -> bool:
    choice = config.storage.commit_writer
    if choice == "thread" or not process_writer_available():
        return False
    return choice == "process" or steps_to_go >= PROCESS_WRITER_MIN_STEPS


def _stored_steps(store: Store) -> int:
    return int(store.attrs["config"]["sampler"]["steps"])


def _check_identity(store: Store, identity: dict[str, Any], path: Path) -> None:
    diffs = describe_differences(store.attrs.get("identity", {}), identity)
    if diffs:
        raise StoreConflictError(
            f"{path}: store was made with different settings: {'; '.join(diffs)}. "
            "Use --restart (restart=True) to discard it and start over"
        )


def _refresh_config(store: Store, config: RunConfig) -> None:
    norm = config.normalised()
    if store.attrs["config"] != norm:
        store.update_attrs(config=norm, config_hash=config_hash(norm))


def _create(
    config: RunConfig, model: LoadedModel, replica: int, identity: dict[str, Any], path: Path
) -> Store:
    pos, lp, blobs, _ = initial_state(config, model, replica)
    start = {POSITION: pos, LOG_PROB: lp}
    for k, b in enumerate(config.sampler.blobs):
        start[f"{BLOB}/{b}"] = blobs[:, k]
    st = config.storage
    record = {
        "format_version": 1,
        "steps_done": 0,
        "random_state": random_state_to_json(
            sampler_random_state(config.seed, replica).get_state()
        ),
        "checksums": {},
        "segments": [],
        "updated_utc": utc_now(),
    }
    path.parent.mkdir(parents=True, exist_ok=True)
    return Store.create(
        path,
        attrs=_store_attrs(config, replica, identity),
        walkers=config.sampler.walkers,
        n_params=len(config.parameters),
        blob_names=config.sampler.blobs,
        capacity=config.sampler.steps,
        chunk_steps=st.chunk_steps,
        codec=st.codec,
        level=st.level,
        start=start,
        commit=record,
        fsync=st.fsync,
    )


def _advance(
    store: Store,
    config: RunConfig,
    model: LoadedModel,
    kind: str,
    stop: _StopFlag,
    progress: str,
    progress_interval: float,
    stream: TextIO | None,
    label: str,
    lock_fds: list[int],
) -> None:
    target = config.sampler.steps
    done = store.steps_done
    st = config.storage
    fsync = st.fsync
    store.ensure_capacity(target)
    last = store.last_state()
    record = store.commit_record
    blob_names = store.blob_names
    walkers, n_params = last[POSITION].shape
    n_blobs = len(blob_names)
    blobs0 = (
        np.column_stack([last[f"{BLOB}/{b}"] for b in blob_names])
        if n_blobs
        else np.empty((walkers, 0))
    )
    driver = EnsembleDriver(
        model,
        config.sampler.moves,
        last[POSITION],
        last[LOG_PROB],
        blobs0,
        record["random_state"],
        check_start=(done == 0),
    )
    bytes_per_step = walkers * (n_params + 2 + n_blobs) * 8
    pending_cap = max(1, min(st.commit_every_steps, MAX_PENDING_BYTES // bytes_per_step))
    buf = StepBuffer(walkers, n_params, n_blobs, store.chunk_steps, pending_cap)
    buf.load_tail(store, done)
    segment = {
        "kind": kind,
        "from_step": done,
        "to_step": done,
        "started_utc": utc_now(),
        "ended_utc": None,
        "host": host_record()["host"],
        "pid": host_record()["pid"],
        "config_hash": config_hash(config.normalised()),
        "software": software_versions(),
    }
    committed = done
    reporter = Progress(
        target, done, mode=progress, interval=progress_interval, stream=stream, label=label
    )
    reporter.message(
        {"start": "starting", "resume": "resuming", "extend": "extending"}[kind]
        + f" replica {store.replica} at step {done:,} of {target:,}"
    )
    accepted_sum = 0
    first_commit = True
    writer = Committer(
        store,
        use_process=_use_process(config, target - done),
        capacity=bytes_per_step * (store.chunk_steps + pending_cap) + 64 * (3 + n_blobs),
        keep_open=lock_fds,
    )

    def commit(upto: int) -> None:
        """Hand steps ``[committed, upto)`` to the writer (the RNG state is taken now, at a
        step boundary); sampling goes on while they are encoded, written and flushed."""
        nonlocal committed, first_commit, i, counted
        if upto <= committed:
            return
        writer.wait()
        origin = (committed // buf.chunk) * buf.chunk
        job = CommitJob(
            origin=origin,
            start=committed,
            upto=upto,
            random_state=driver.random_state(),
            segment=segment,
            first=first_commit,
            fsync=fsync,
        )
        writer.submit(job, buf.rows(origin, upto, blob_names))
        first_commit = False
        committed = upto
        buf.drop_before(committed)
        i = counted = buf.fill  # the rows kept moved to the front of the buffer

    every_seconds = st.commit_every_seconds
    # committing at the last chunk boundary before the target leaves the final commit, which
    # the caller waits for, at most one chunk to encode
    last_boundary = ((target - 1) // buf.chunk) * buf.chunk
    position, log_prob, accepted, blobs = buf.position, buf.log_prob, buf.accepted, buf.blobs
    last_commit_time = last_check_time = time.monotonic()
    last_report = 0.0
    step = last_check_step = done
    i = counted = buf.fill  # next buffer row; rows before ``counted`` are in accepted_sum
    check_row = i + 1  # the bookkeeping below runs when row ``check_row - 1`` is filled

    def settle() -> None:
        """Bring ``step``, the buffer fill and the acceptance count up to row ``i``."""
        nonlocal step, counted, accepted_sum
        buf.fill = i
        step = buf.origin + i
        accepted_sum += int(np.count_nonzero(accepted[counted:i]))
        counted = i

    try:
        for rows in driver.steps(target - done):
            # per step only the copies (emcee's in-memory backend makes the same ones)
            position[i] = rows.position
            log_prob[i] = rows.log_prob
            accepted[i] = rows.accepted
            if n_blobs:
                blobs[:, i] = rows.blobs.T
            i += 1
            if i < check_row:
                continue
            settle()
            now = time.monotonic()
            if (
                step - committed >= pending_cap
                or now - last_commit_time >= every_seconds
                or step == last_boundary
            ):
                commit(step)
                last_commit_time = now
            if now - last_report >= 0.2:
                last_report = now
                reporter.update(step, accepted_sum / ((step - done) * walkers))
            if stop.signum is not None:
                # at a step boundary: the RNG state matches the last buffered step
                commit(step)
                writer.wait()
                name = signal.Signals(stop.signum).name
                reporter.message(
                    f"stopped by {name} at step {committed:,} of {target:,}; rerun to continue"
                )
                raise Interrupted(stop.signum)
            # the next check about CHECK_SECONDS on (at once for slow models), and never past
            # a point where a commit is due by step count
            elapsed = now - last_check_time
            stride = MAX_CHECK_STRIDE
            if elapsed > 0:
                stride = int(CHECK_SECONDS * (step - last_check_step) / elapsed)
            last_check_time, last_check_step = now, step
            due = committed + pending_cap
            if step < last_boundary:
                due = min(due, last_boundary)
            check_row = min(step + max(1, min(stride, MAX_CHECK_STRIDE)), due) - buf.origin
        settle()
        commit(step)
        writer.wait()
    finally:
        writer.close()  # an in-flight commit of finished steps completes
        settle()
        steps_here = step - done
        acc = accepted_sum / (steps_here * walkers) if steps_here else float("nan")
        reporter.update(step, acc)
        reporter.close(acc)
    reporter.message(f"done: {committed:,} steps committed")
