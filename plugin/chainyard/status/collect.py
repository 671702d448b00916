"""Where each run of a workflow stands, read from its results folder without taking any lock.

Layout read (the rule library's, see ``rules/sample.smk``)::

    RESULTS/RUN/.resumable/replica-R.zarr          the store being sampled (commits land here)
    RESULTS/RUN/.resumable/.replica-R.zarr.running the "run in progress" marker (engine.marker)
    RESULTS/RUN/.resumable/replica-R.zarr.failed.json  the retry note of a final failure
    RESULTS/RUN/draws/replica-R.zarr               the published store (the job's output)
    RESULTS/logs/RUN/sample-replica-R.log          the job's log
    RESULTS/logs/RUN/sample-replica-R.failure.json the job's failure (run, replica, exit_code,
                                                   reason), when present

Only committed data is read: ``commit.json`` is replaced atomically by the writer, so a reader
sees one commit or the next, on a local disk or a shared file system. A writer holds an OS file
lock that only its own host can test, so liveness is told from the marker instead: on this
host by its process id, on another host by how long ago the last commit (or the marker) was
written (``stale_after`` seconds).
"""

from __future__ import annotations

import contextlib
import os
import re
import socket
import time
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

from chainyard.status.failures import failure_reason, mtime

__all__ = [
    "STATES",
    "ReplicaStatus",
    "RunStatus",
    "collect",
    "combine",
    "discover_runs",
    "eta_seconds",
]

#: states, problems first (the order of the table)
STATES = ("failed", "stale lock", "sampling", "waiting", "done")

_REPLICA_NAME = re.compile(r"^replica-(\d{1,6})\.zarr$")
_LOG_NAME = re.compile(r"^sample-replica-(\d{1,6})\.(log|failure\.json)$")


@dataclass
class ReplicaStatus:
    """One replica of one run.

    Attributes
    ----------
    replica : int
    state : str
        One of :data:`STATES`.
    steps_done : int
        Committed steps.
    steps_asked : int or None
        Steps the run config asks for (None: not known yet).
    steps_per_second : float or None
        Recent sampling speed (steps/s; None when not sampling or not measurable).
    reason : str or None
        One line for a failed replica or a stale lock.
    store : Path or None
        The store read (the resumable one while sampling), None before it exists.
    updated : float or None
        Time of the last commit (seconds since the epoch).
    progress : list of (float, int)
        (time in seconds since the epoch, committed steps) at each segment's start and end.
    """

    replica: int
    state: str
    steps_done: int = 0
    steps_asked: int | None = None
    steps_per_second: float | None = None
    reason: str | None = None
    store: Path | None = None
    updated: float | None = None
    progress: list[tuple[float, int]] = field(default_factory=list)
    run_replicas: int | None = None


@dataclass
class RunStatus:
    """One run (or family member): its replicas and their totals.

    Attributes
    ----------
    run : str
    state : str
        The worst replica state (order of :data:`STATES`); ``done`` only when all are done.
    steps_done, steps_asked : int, int or None
        Sums over the replicas (committed / asked).
    steps_per_second : float or None
        Sum of the sampling replicas' speeds (steps/s).
    eta_seconds : float or None
        Seconds until the slowest unfinished replica is done at its recent speed (None when a
        replica has no speed yet); 0 when done.
    reason : str or None
        The first failed (or stale) replica's line.
    verdict : dict or None
        The interim verdict (:mod:`chainyard.status.verdict`), None until there is one.
    """

    run: str
    replicas: list[ReplicaStatus]
    state: str = "waiting"
    steps_done: int = 0
    steps_asked: int | None = None
    steps_per_second: float | None = None
    eta_seconds: float | None = None
    reason: str | None = None
    verdict: dict[str, Any] | None = None
    history: list[dict[str, Any]] = field(default_factory=list)

    def to_json(self) -> dict[str, Any]:
        """The run as the JSON object of ``status --json``."""
        return {
            "run": self.run,
            "state": self.state,
            "reason": self.reason,
            "steps_done": self.steps_done,
            "steps_asked": self.steps_asked,
            "steps_per_second": _rounded(self.steps_per_second),
            "eta_seconds": _rounded(self.eta_seconds),
            "verdict": self.verdict,
            "replicas": [
                {
                    "replica": r.replica,
                    "state": r.state,
                    "steps_done": r.steps_done,
                    "steps_asked": r.steps_asked,
                    "steps_per_second": _rounded(r.steps_per_second),
                    "reason": r.reason,
                }
                for r in self.replicas
            ],
        }


def _rounded(value: float | None) -> float | None:
    return None if value is None else round(float(value), 3)


def _utc_seconds(text: Any) -> float | None:
    """Seconds since the epoch of an ISO 8601 UTC time (``...Z``); None if not one."""
    if not isinstance(text, str):
        return None
    try:
        return datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()
    except ValueError:
        return None


def discover_runs(results: Path) -> dict[str, set[int]]:
    """Runs (and their replica indices seen so far) under a results folder.

    A run is a folder of ``results`` holding ``.resumable/`` or ``draws/`` replica stores, or
    a folder ``logs/RUN`` holding sampling logs or failure notes.
    """
    runs: dict[str, set[int]] = {}
    try:
        entries = sorted(results.iterdir())
    except OSError:
        return runs
    for entry in entries:
        if entry.name.startswith(".") or not entry.is_dir() or entry.name == "logs":
            continue
        for sub in (".resumable", "draws"):
            folder = entry / sub
            if folder.is_dir():
                for store in folder.iterdir():
                    m = _REPLICA_NAME.match(store.name)
                    if m:
                        runs.setdefault(entry.name, set()).add(int(m.group(1)))
    logs = results / "logs"
    if logs.is_dir():
        for run_logs in sorted(logs.iterdir()):
            if not run_logs.is_dir() or run_logs.name.startswith("."):
                continue
            for item in run_logs.iterdir():
                m = _LOG_NAME.match(item.name)
                if m:
                    runs.setdefault(run_logs.name, set()).add(int(m.group(1)))
    return runs


def _pid_alive(pid: Any) -> bool:
    if not isinstance(pid, int) or pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OSError:
        return False
    return True


@dataclass
class _StoreInfo:
    steps_done: int
    steps_asked: int | None
    commit_every_seconds: float | None
    updated: float | None
    segments: list[dict[str, Any]]
    replicas: int | None


def _store_info(path: Path) -> _StoreInfo | None:
    """What a store's commit record and attributes say (None: no readable store there)."""
    from chainyard.errors import ChainyardError
    from chainyard.store import Store

    if not (path / "commit.json").is_file():
        return None
    try:
        store = Store.open(path)
    except (ChainyardError, OSError):
        return None
    try:
        record = store.commit_record
        asked: int | None = None
        every: float | None = None
        replicas: int | None = None
        with contextlib.suppress(Exception):  # a foreign or older config: unknown, not fatal
            config = store.config
            asked = int(config.sampler.steps)
            every = float(config.storage.commit_every_seconds)
            replicas = int(config.replicas)
        segments = [s for s in record.get("segments", []) if isinstance(s, dict)]
        updated = _utc_seconds(record.get("updated_utc")) or mtime(path / "commit.json")
        return _StoreInfo(int(store.steps_done), asked, every, updated, segments, replicas)
    finally:
        store.close()


def _progress(segments: list[dict[str, Any]]) -> list[tuple[float, int]]:
    points: list[tuple[float, int]] = []
    for seg in segments:
        t0, t1 = _utc_seconds(seg.get("started_utc")), _utc_seconds(seg.get("ended_utc"))
        a, b = seg.get("from_step"), seg.get("to_step")
        if t0 is not None and isinstance(a, int):
            points.append((t0, a))
        if t1 is not None and isinstance(b, int):
            points.append((t1, b))
    return points


def _segment_rate(segments: list[dict[str, Any]]) -> float | None:
    """Steps/s of the last segment (from its start to its last commit)."""
    if not segments:
        return None
    seg = segments[-1]
    t0, t1 = _utc_seconds(seg.get("started_utc")), _utc_seconds(seg.get("ended_utc"))
    a, b = seg.get("from_step"), seg.get("to_step")
    if None in (t0, t1) or not isinstance(a, int) or not isinstance(b, int) or b <= a:
        return None
    assert t0 is not None and t1 is not None
    return (b - a) / max(t1 - t0, 1.0)


def replica_status(
    results: Path,
    run: str,
    replica: int,
    *,
    steps_asked: int | None = None,
    stale_after: float | None = None,
    now: float | None = None,
    host: str | None = None,
) -> ReplicaStatus:
    """The state of one replica (see the module docstring for what is read).

    Parameters
    ----------
    steps_asked : int, optional
        Steps asked (from the workflow config); default: the store's own config.
    stale_after : float, optional
        Seconds without a commit after which a writer on another host counts as gone
        (default: ten commit intervals of the run, at least 10 minutes).
    now : float, optional
        Current time, seconds since the epoch.
    host : str, optional
        This host's name (markers written here are checked by process id).
    """
    now = time.time() if now is None else now
    host = socket.gethostname() if host is None else host
    from chainyard.engine.marker import read_marker

    resumable = results / run / ".resumable" / f"replica-{replica}.zarr"
    published = results / run / "draws" / f"replica-{replica}.zarr"
    info = _store_info(resumable)
    store: Path | None = resumable if info is not None else None
    if info is None:
        info = _store_info(published)
        store = published if info is not None else None
    status = ReplicaStatus(replica=replica, state="waiting", store=store)
    if info is not None:
        status.steps_done = info.steps_done
        status.steps_asked = info.steps_asked
        status.updated = info.updated
        status.progress = _progress(info.segments)
        status.run_replicas = info.replicas
    if steps_asked is not None:
        status.steps_asked = steps_asked
    asked = status.steps_asked
    complete = info is not None and asked is not None and info.steps_done >= asked
    marker = read_marker(resumable)
    failure = failure_reason(results, run, replica)
    if marker is not None:
        latest = max(
            t
            for t in (info.updated if info else None, _marker_time(resumable), 0.0)
            if t is not None
        )
        if marker.get("host") == host:
            alive = _pid_alive(marker.get("pid"))
            gone = "its process has ended"
        else:
            every = info.commit_every_seconds if info and info.commit_every_seconds else 30.0
            limit = stale_after if stale_after is not None else max(10 * every, 600.0)
            alive = now - latest <= limit
            gone = f"no commit for {_duration(now - latest)}"
        if alive:
            status.state = "sampling"
            status.steps_per_second = _segment_rate(info.segments) if info else None
            return status
        who = f"pid {marker.get('pid', '?')} on {marker.get('host', '?')}"
        if failure is not None and failure[1] >= latest:
            status.state, status.reason = "failed", failure[0]
        else:
            status.state = "stale lock"
            status.reason = (
                f"writer {who} is gone ({gone}) after committing step {status.steps_done:,}; "
                "rerunning the workflow resumes from there"
            )
        return status
    if complete and published.exists():
        status.state = "done"
        return status
    if failure is not None and (info is None or info.updated is None or failure[1] >= info.updated):
        status.state, status.reason = "failed", failure[0]
        return status
    if complete:  # every asked step committed and no writer left (publishing is a link)
        status.state = "done"
    return status


def _marker_time(resumable: Path) -> float | None:
    from chainyard.engine.marker import marker_path

    return mtime(marker_path(resumable))


def _duration(seconds: float) -> str:
    seconds = max(0.0, seconds)
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def combine(run: str, replicas: list[ReplicaStatus], n_replicas: int | None = None) -> RunStatus:
    """A run's totals and state from its replicas (missing replicas count as waiting).

    Parameters
    ----------
    n_replicas : int, optional
        Replicas the run asks for (from the workflow config); replicas not seen are waiting.
    """
    seen = {r.replica for r in replicas}
    asked_each = next((r.steps_asked for r in replicas if r.steps_asked is not None), None)
    for index in range(n_replicas or 0):
        if index not in seen:
            replicas.append(ReplicaStatus(replica=index, state="waiting", steps_asked=asked_each))
    replicas.sort(key=lambda r: r.replica)
    out = RunStatus(run=run, replicas=replicas)
    out.state = min((r.state for r in replicas), key=STATES.index, default="waiting")
    if replicas and all(r.state == "done" for r in replicas):
        out.state = "done"
    elif out.state == "done":  # some done, others not started
        out.state = "waiting"
    bad = next((r for r in replicas if r.reason and r.state == out.state), None)
    if bad is not None:
        out.reason = f"replica {bad.replica}: {bad.reason}"
    out.steps_done = sum(r.steps_done for r in replicas)
    asked = [r.steps_asked for r in replicas]
    out.steps_asked = sum(a for a in asked if a is not None) if None not in asked else None
    rates = [r.steps_per_second for r in replicas if r.steps_per_second]
    out.steps_per_second = sum(rates) if rates else None
    out.eta_seconds = eta_seconds(replicas)
    return out


def eta_seconds(replicas: list[ReplicaStatus]) -> float | None:
    """Seconds until the slowest unfinished replica is done (0: all done; None: unknown)."""
    if replicas and all(r.state == "done" for r in replicas):
        return 0.0
    worst = 0.0
    for r in replicas:
        if r.state == "done":
            continue
        if r.steps_asked is None or not r.steps_per_second or r.state != "sampling":
            return None
        worst = max(worst, max(r.steps_asked - r.steps_done, 0) / r.steps_per_second)
    return worst


def collect(
    results: Path,
    *,
    planned: dict[str, tuple[int, int]] | None = None,
    stale_after: float | None = None,
    now: float | None = None,
) -> list[RunStatus]:
    """Every run under ``results`` (and every planned run), problems first.

    Parameters
    ----------
    results : Path
        The workflow's results folder.
    planned : dict, optional
        run -> (replicas, steps asked) from the workflow config: runs not started yet are
        listed as waiting, and these counts replace the stores' own.
    stale_after : float, optional
        See :func:`replica_status`.
    now : float, optional
        Current time, seconds since the epoch.
    """
    now = time.time() if now is None else now
    host = socket.gethostname()
    found = discover_runs(results)
    names = sorted(set(found) | set(planned or {}))
    runs: list[RunStatus] = []
    for name in names:
        n_replicas, asked = (planned or {}).get(name, (None, None))
        indices = set(found.get(name, set())) | set(range(n_replicas or 0))
        replicas = [
            replica_status(
                results, name, i, steps_asked=asked, stale_after=stale_after, now=now, host=host
            )
            for i in sorted(indices)
        ]
        if n_replicas is None:  # the stores say how many replicas the run has
            n_replicas = _stored_replicas(replicas)
        runs.append(combine(name, replicas, n_replicas))
    runs.sort(key=lambda r: (STATES.index(r.state), r.run))
    return runs


def _stored_replicas(replicas: list[ReplicaStatus]) -> int | None:
    """The run's replica count from the first readable store's config (None if none)."""
    return next((r.run_replicas for r in replicas if r.run_replicas is not None), None)
