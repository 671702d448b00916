"""Where each run of a workflow stands, read from its results folder without taking any lock.

Runs are found by their replica stores and sampling logs (:func:`discover_runs`); each
replica's state is told by :mod:`chainyard.status.replica` (the layout it reads, and how a
writer's liveness is told, are described there) and the replicas are combined into a run by
:func:`chainyard.status.states.combine`.
"""

from __future__ import annotations

import re
import socket
import time
from pathlib import Path

from chainyard.status.replica import replica_status
from chainyard.status.states import STATES, ReplicaStatus, RunStatus, combine, eta_seconds

__all__ = [
    "STATES",
    "ReplicaStatus",
    "RunStatus",
    "collect",
    "combine",
    "discover_runs",
    "eta_seconds",
]

_REPLICA_NAME = re.compile(r"^replica-(\d{1,6})\.zarr$")
_LOG_NAME = re.compile(r"^sample-replica-(\d{1,6})\.(log|failure\.json)$")


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
