"""The run loop: create, resume or extend a store, and commit steps as they come.

``sample`` is the only entry point. It validates everything that can be checked before a
byte is written (model, data, initial state), takes the store's single-writer lock, compares
an existing store's identity with the requested run, and then advances the sampler,
committing by step count and by wall time (whichever first; :mod:`chainyard.engine.loop`).
SIGTERM and SIGINT commit the finished steps before the process exits, so a wall-time limit
loses nothing; a step still running ``STOP_GRACE_SECONDS`` after the signal is abandoned
(:mod:`chainyard.engine.stopping`). SIGKILL loses at most the steps since the last commit.

What is at the store path decides what happens (:func:`chainyard.engine.guards.path_state`):
nothing, or a creation cut short before any row was committed, is (re)created; a store with a
commit record is resumed or extended after checking its identity and what the resume builds
on; anything else is refused (exit 4) unless ``restart``. A complete store is recognised
without writing or locking (it may sit on a read-only file system). While it works,
``sample`` keeps a marker beside the store (:mod:`chainyard.engine.marker`) so that the next
run can say that this one ended abnormally. Refused writes end in one
:class:`StorageFaultError` line naming the path, the system error and the last commit.

A new store's attributes and start state are made in :mod:`chainyard.engine.create`; the
checks of an existing store (already complete? same settings? resume or extend?) are in
:mod:`chainyard.engine.existing`.
"""

from __future__ import annotations

import contextlib
import signal
from collections.abc import Iterator
from pathlib import Path
from typing import Any, TextIO

from chainyard.config import RunConfig
from chainyard.engine.create import _create
from chainyard.engine.drivers import driver_kind
from chainyard.engine.existing import _check_identity, _complete_read_only, _stored_steps
from chainyard.engine.guards import (
    committed_steps,
    path_state,
    refuse_inside_store,
    refuse_uncommitted,
    storage_fault,
    with_last_commit,
)
from chainyard.engine.identity import run_identity
from chainyard.engine.loop import advance
from chainyard.engine.marker import previous_run_line, read_marker, remove_marker, write_marker
from chainyard.engine.pool import worker_pool
from chainyard.engine.registry import sampler_kind
from chainyard.engine.stopping import Interrupted, StopFlag, stop_on_signals
from chainyard.errors import ChainyardError, ConfigError, StorageFaultError, StoreError
from chainyard.model import LoadedModel, load_model
from chainyard.progress import Progress
from chainyard.store import Store, StoreLock, writer_lock
from chainyard.store.files import discard_folder, remove_discarded
from chainyard.store.integrity import check_resume_base
from chainyard.store.layout import COMMIT_FILE
from chainyard.store.lock import real_store_path
from chainyard.testhooks import instant

__all__ = ["Interrupted", "sample"]


def sample(
    config: RunConfig,
    store_path: str | Path,
    replica: int = 0,
    *,
    restart: bool = False,
    progress: str = "auto",
    progress_interval: float = 10.0,
    stream: TextIO | None = None,
    workers: int | str = 1,
    cpus: int | None = None,
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
    workers : int or "auto"
        Worker processes evaluating the log-probabilities (1: this process; ``"auto"``: up
        to ``cpus``, where timing shows it pays); see :mod:`chainyard.engine.pool`. Not part
        of the store's identity: the draws are the same for any count.
    cpus : int, optional
        CPUs the run may use (default: those this process may run on): caps ``"auto"`` and
        the BLAS/OpenMP threads of each worker.

    Returns
    -------
    Store
        The store, opened for reading.

    Raises
    ------
    ConfigError, ModelError, StoreError, StoreConflictError, StoreLockedError
        On bad input; an existing store is never altered in that case.
    StorageFaultError
        The file system refused a write (full, read-only, file-size limit, I/O error); the
        store keeps its last commit.
    Interrupted
        SIGTERM/SIGINT: the finished steps were committed (or, if a step was still running
        ``STOP_GRACE_SECONDS`` after the signal, the run stopped without it).
    """
    if str(store_path).startswith("s3:/"):
        raise ConfigError(
            f"--out {store_path}: sample writes local stores only (object storage has no atomic "
            "rename or lock for its commits); sample to a local path, then `chainyard publish "
            "STORE s3://BUCKET/PATH`"
        )
    path = Path(store_path)
    refuse_inside_store(path, "store")
    try:
        model = load_model(config)
    except ConfigError as exc:
        raise exc.located(config.source) from None
    identity = run_identity(config, replica, driver_kind(config))
    sampler_kind(config.sampler.kind).preflight(config)  # e.g. a user kernel is imported
    label = f"{path.name}"
    say = Progress(1, 0, mode="log", stream=stream, label=label).message
    if not restart and _complete_read_only(config, path, identity, say):
        return Store.open(path)
    with (
        _ignore_file_size_signal(),
        stop_on_signals() as stop,
        worker_pool(model, config, workers, cpus, say),
    ):
        try:
            with writer_lock(path) as lock:
                marker = read_marker(path)
                try:
                    write_marker(path, committed_steps(path) or 0)
                    _work(
                        config,
                        model,
                        replica,
                        identity,
                        path,
                        restart,
                        stop,
                        marker,
                        say,
                        progress,
                        progress_interval,
                        stream,
                        label,
                        lock,
                    )
                except OSError as exc:
                    raise storage_fault(exc, path, committed_steps(path)) from None
                except StorageFaultError as exc:
                    raise with_last_commit(exc, committed_steps(path)) from None
                finally:
                    remove_marker(path)
        except Interrupted as exc:
            if not exc.reported:
                name = signal.Signals(exc.signum).name
                steps = committed_steps(path)
                where = (
                    "nothing was committed"
                    if steps is None
                    else (f"the last commit (step {steps:,}) is intact")
                )
                why = (
                    f"a step was still running {stop.grace:g} s after the signal; stopped "
                    "without it"
                    if stop.forced
                    else "stopped at once"
                )
                say(f"stopped by {name}: {why}; {where}; rerun to continue")
                exc.reported = True
            raise
    return Store.open(path)


@contextlib.contextmanager
def _ignore_file_size_signal() -> Iterator[None]:
    """Ignore SIGXFSZ so that a write past ``ulimit -f`` fails with EFBIG (reported as a
    storage fault) instead of killing the process."""
    try:
        old = signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    except (ValueError, AttributeError):  # not the main thread, or no such signal
        yield
        return
    try:
        yield
    finally:
        signal.signal(signal.SIGXFSZ, old)


def _work(
    config: RunConfig,
    model: LoadedModel,
    replica: int,
    identity: dict[str, Any],
    path: Path,
    restart: bool,
    stop: StopFlag,
    marker: dict[str, Any] | None,
    say: Any,
    progress: str,
    progress_interval: float,
    stream: TextIO | None,
    label: str,
    lock: StoreLock,
) -> None:
    """Everything ``sample`` does under the store lock."""
    real = real_store_path(path)  # removals and creation go through symlinks to the store
    remove_discarded(real)  # what a removal killed half-way left beside the store
    state = path_state(real)
    if restart and state != "missing":
        if state in ("file", "foreign"):
            raise StoreError(f"{path}: exists and is not a chainyard store; not removing it")
        discard_folder(real)
        state = "missing"
    if state == "uncommitted-data":
        raise refuse_uncommitted(path)
    if state == "unfinished":  # a creation cut short: it never committed a row
        discard_folder(real)
        state = "missing"
    if state == "committed":
        store = Store.open(path, writable=True)
        if marker is not None:
            say(
                previous_run_line(
                    marker, store.steps_done, complete=store.steps_done >= config.sampler.steps
                )
            )
        if store.attrs.get("derived") is not None:
            raise StoreError(
                f"{path}: is a derived (trimmed or thinned) store and cannot be sampled "
                "into; give the original store or a new path"
            )
        _check_identity(store, identity, path)
        if store.steps_done >= config.sampler.steps:
            say(
                f"already complete ({store.steps_done:,} steps committed, "
                f"{config.sampler.steps:,} requested); nothing to do"
            )
            return
        check_resume_base(store)  # refuses a damaged commit record or last chunk (exit 4)
        if store.steps_done == 0 and not store.commit_record.get("segments"):
            kind = "start"  # created, but cut short before its first data commit
        elif store.steps_done >= _stored_steps(store):
            kind = "extend"
        else:
            kind = "resume"
    elif state == "file":
        raise StoreError(f"{path}: exists and is a file, not a store directory")
    elif state == "foreign":
        raise StoreError(
            f"{path}: exists and is not a chainyard store (no {COMMIT_FILE}); give a new path"
        )
    else:
        if marker is not None:
            say(previous_run_line(marker, None))
        try:
            store = _create(config, model, replica, identity, real)
        except ConfigError as exc:
            raise exc.located(config.source) from None
        except (OSError, StorageFaultError):
            _discard_quietly(real)  # a creation cut short: nothing of value
            raise
        lock.cover_folder()  # the new folder is locked too (another mount reaching it)
        instant("store-created")
        kind = "start"
    try:
        advance(
            store,
            config,
            model,
            kind,
            stop,
            progress,
            progress_interval,
            stream,
            label,
            lock.fds,  # the commit helper inherits them
        )
    except (ChainyardError, OSError):
        if kind == "start" and committed_steps(real) == 0:
            _discard_quietly(real)  # nothing of value was made by it
        raise


def _discard_quietly(real: Path) -> None:
    """Discard a store this run created and never committed a row to, keeping the error
    that got us here (a store that cannot be removed stays "unfinished": cleaned next run)."""
    with contextlib.suppress(OSError):
        if real.exists():
            discard_folder(real)
