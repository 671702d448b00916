"""The state of one replica, read from the results folder without taking any lock.

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
import socket
import time
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

from chainyard.status.failures import failure_reason, mtime
from chainyard.status.states import ReplicaStatus

__all__ = ["replica_status"]


def _utc_seconds(text: Any) -> float | None:
    """Seconds since the epoch of an ISO 8601 UTC time (``...Z``); None if not one."""
    if not isinstance(text, str):
        return None
    try:
        return datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()
    except ValueError:
        return None


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
