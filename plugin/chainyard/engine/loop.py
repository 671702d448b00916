"""The commit loop: advance the sampler and commit steps as they come.

Per step only the rows are copied into the buffer; the bookkeeping (commit due? progress?
stop signal?) runs about every ``CHECK_SECONDS``. Commits go to a :class:`Committer` (a
writer thread, then a helper process), one in flight at a time. Before the first commit of
a process the model is evaluated again at the stored start (``model.check_deterministic``).
"""

from __future__ import annotations

import signal
import time
from typing import Any, TextIO

import numpy as np

from chainyard.config import RunConfig, config_hash
from chainyard.engine.buffer import StepBuffer
from chainyard.engine.commit import CommitJob
from chainyard.engine.drivers import make_driver
from chainyard.engine.guards import check_deterministic
from chainyard.engine.protocol import StepBlock, fill_block
from chainyard.engine.recheck import LaterStepCheck
from chainyard.engine.stopping import Interrupted, StopFlag
from chainyard.engine.writer import Committer, process_writer_available
from chainyard.errors import StoreError
from chainyard.facts import host_record, software_versions, utc_now
from chainyard.model import LoadedModel
from chainyard.progress import Progress
from chainyard.store import Store
from chainyard.store.layout import BLOB, LOG_PROB, POSITION

__all__ = ["advance"]

#: pending rows are committed at the latest when they reach this many bytes
MAX_PENDING_BYTES = 128 * 2**20


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


def _refresh_config(store: Store, config: RunConfig) -> None:
    """Store the run's config (it may ask for more steps) if it differs from the stored one."""
    norm = config.normalised()
    if store.attrs["config"] != norm:
        store.update_attrs(config=norm, config_hash=config_hash(norm))


def _blob_columns(state: dict[str, Any], blob_names: tuple[str, ...], walkers: int) -> np.ndarray:
    """The blobs of a stored state as one array, shape (walkers, n_blobs)."""
    if not blob_names:
        return np.empty((walkers, 0))
    return np.column_stack([state[f"{BLOB}/{b}"] for b in blob_names])


def advance(
    store: Store,
    config: RunConfig,
    model: LoadedModel,
    kind: str,
    stop: StopFlag,
    progress: str,
    progress_interval: float,
    stream: TextIO | None,
    label: str,
    lock_fds: list[int],
) -> None:
    """Advance ``store`` (opened for writing, lock held) to ``config.sampler.steps``.

    ``kind`` (``"start"``, ``"resume"`` or ``"extend"``) names this run's segment. Raises
    :class:`Interrupted` after committing the finished steps when ``stop`` is set, and
    whatever a commit or the model raised (after the commit in flight has finished).
    """
    target = config.sampler.steps
    done = store.steps_done
    st = config.storage
    fsync = st.fsync
    last = store.last_state()
    record = store.commit_record
    blob_names = store.blob_names
    walkers, n_params = last[POSITION].shape
    n_blobs = len(blob_names)
    blobs0 = _blob_columns(last, blob_names, walkers)
    try:
        driver = make_driver(
            config, model, last[POSITION], last[LOG_PROB], blobs0, record["random_state"], step=done
        )
    except ValueError as exc:
        raise StoreError(
            f"{store.path}: the last commit's random state does not fit this sampler ({exc}); "
            "the store is damaged"
        ) from None
    model_blobs = tuple(config.sampler.blobs)  # the engine's own blobs are not the model's
    bytes_per_step = walkers * (n_params + 2 + n_blobs) * 8
    pending_cap = max(1, min(st.commit_every_steps, MAX_PENDING_BYTES // bytes_per_step))
    # a commit due while the previous one is still being written waits (sampling goes on)
    # until that one is done, or until this many steps are pending
    lag_cap = max(pending_cap, min(2 * pending_cap, MAX_PENDING_BYTES // bytes_per_step))
    buf = StepBuffer(walkers, n_params, n_blobs, store.chunk_steps, lag_cap)
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
    # the determinism check compares with the stored start (once per process)
    start_state = store.start_state() if config.model.check_deterministic else None
    later_check = LaterStepCheck(model, driver) if config.model.check_deterministic else None
    writer: Committer | None = None

    def open_writer() -> Committer:
        """At the first commit: record the new target in the store (grow the arrays, store
        the config), then start the writer. Until then the store is untouched, so a run that
        fails before committing anything (model error, non-deterministic model, signal)
        leaves an existing store byte for byte as it was."""
        _refresh_config(store, config)
        store.ensure_capacity(target)
        return Committer(
            store,
            use_process=_use_process(config, target - done),
            capacity=bytes_per_step * (store.chunk_steps + lag_cap) + 64 * (3 + n_blobs),
            keep_open=lock_fds,
        )

    def commit(upto: int) -> None:
        """Hand steps ``[committed, upto)`` to the writer (the RNG state is taken now, at a
        step boundary); sampling goes on while they are encoded, written and flushed."""
        nonlocal committed, first_commit, i, counted, start_state, writer
        if upto <= committed:
            return
        if start_state is not None:
            check_deterministic(
                model,
                start_state[POSITION],
                start_state[LOG_PROB],
                _blob_columns(start_state, model_blobs, walkers),
            )
            start_state = None
        if first_commit:
            check_rng = getattr(driver, "check_reproducible", None)
            if check_rng is not None:
                check_rng()  # a user kernel's randomness must all come from its rng
        if later_check is not None:  # one state of these rows again (engine/recheck.py)
            window = slice(committed - buf.origin, upto - buf.origin)
            later_check(buf.position[window], buf.log_prob[window])
        if writer is None:
            writer = open_writer()
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

    def shown_acceptance(rate: float) -> float:
        """The driver's own acceptance for progress lines (accept-reject: the proposals')."""
        own = getattr(driver, "progress_acceptance", None)
        return rate if own is None else float(own)

    def settle() -> None:
        """Bring ``step``, the buffer fill and the acceptance count up to row ``i``."""
        nonlocal step, counted, accepted_sum
        buf.fill = i
        step = buf.origin + i
        accepted_sum += int(np.count_nonzero(accepted[counted:i]))
        counted = i

    try:
        block = StepBlock(position, log_prob, accepted, blobs)
        while i < target - buf.origin:
            # the steps up to the next check go straight into the buffer, a block at a time
            end = min(check_row, target - buf.origin)
            fill_block(driver, block, i, end)
            i = end
            if i < check_row:
                break  # the target is reached before the next check
            settle()
            now = time.monotonic()
            if (
                step - committed >= pending_cap
                or now - last_commit_time >= every_seconds
                or step == last_boundary
            ) and not (
                # the previous commit is still being written: sample on instead of waiting
                # for it (cheap steps); a later check commits, at the latest at ``lag_cap``.
                # Not with commit_writer "thread", whose commits stay at their points
                writer is not None
                and step - committed < lag_cap
                and (writer.kind == "process" or st.commit_writer != "thread")
                and writer.busy()
            ):
                commit(step)
                last_commit_time = now
            if now - last_report >= 0.2:
                last_report = now
                reporter.update(step, shown_acceptance(accepted_sum / ((step - done) * walkers)))
            if stop.signum is not None:
                # at a step boundary: the RNG state matches the last buffered step
                stop.cancel()  # the finished steps are committed now, however long it takes
                commit(step)
                if writer is not None:
                    writer.wait()
                name = signal.Signals(stop.signum).name
                reporter.message(
                    f"stopped by {name} at step {committed:,} of {target:,}; rerun to continue"
                )
                raise Interrupted(stop.signum, reported=True)
            # the next check about CHECK_SECONDS on (at once for slow models), and never past
            # a point where a commit is due by step count
            elapsed = now - last_check_time
            stride = MAX_CHECK_STRIDE
            if elapsed > 0:
                stride = int(CHECK_SECONDS * (step - last_check_step) / elapsed)
            last_check_time, last_check_step = now, step
            due = committed + (pending_cap if step - committed < pending_cap else lag_cap)
            if step < last_boundary:
                due = min(due, last_boundary)
            check_row = min(step + max(1, min(stride, MAX_CHECK_STRIDE)), due) - buf.origin
        settle()
        commit(step)
        if writer is not None:
            writer.wait()
    finally:
        if writer is not None:
            writer.close()  # an in-flight commit of finished steps completes
        settle()
        steps_here = step - done
        acc = accepted_sum / (steps_here * walkers) if steps_here else float("nan")
        acc = shown_acceptance(acc)
        reporter.update(step, acc)
        reporter.close(acc)
    reporter.message(f"done: {committed:,} steps committed")
