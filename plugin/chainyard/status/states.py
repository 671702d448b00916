"""The status of replicas and runs: their states, and a run's state and totals from its replicas.

A run's state is its worst replica's (problems first, the order of :data:`STATES`); its
steps and speeds are sums over the replicas; its ETA is the slowest unfinished replica's.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

__all__ = ["STATES", "ReplicaStatus", "RunStatus", "combine", "eta_seconds"]

#: states, problems first (the order of the table)
STATES = ("failed", "stale lock", "sampling", "waiting", "done")


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
