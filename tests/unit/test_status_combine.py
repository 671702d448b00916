"""How `status` sums a run's replicas: state, steps, speed and ETA (pure functions)."""

from __future__ import annotations

from chainyard.status.collect import ReplicaStatus, combine
from chainyard.status.render_text import format_duration


def _r(i: int, state: str, done: int, rate: float | None = None, reason: str | None = None):  # type: ignore[no-untyped-def]
    return ReplicaStatus(i, state, done, 1000, rate, reason)


def test_worst_state_wins_and_names_its_replica() -> None:
    """A failed replica makes the run failed, with that replica's line."""
    run = combine("a", [_r(0, "sampling", 500, 10.0), _r(1, "failed", 20, reason="boom")])
    assert run.state == "failed"
    assert run.reason == "replica 1: boom"
    assert run.steps_done == 520 and run.steps_asked == 2000


def test_eta_is_the_slowest_replica() -> None:
    """ETA: the replica needing longest at its own speed (500/10 = 50 s vs 800/20 = 40 s)."""
    run = combine("a", [_r(0, "sampling", 500, 10.0), _r(1, "sampling", 200, 20.0)])
    assert run.state == "sampling"
    assert run.steps_per_second == 30.0
    assert run.eta_seconds == 50.0


def test_missing_replicas_wait_and_leave_eta_unknown() -> None:
    """Replicas the config asks for but not started yet are waiting; the ETA is unknown."""
    run = combine("a", [_r(0, "done", 1000)], n_replicas=3)
    assert [r.state for r in run.replicas] == ["done", "waiting", "waiting"]
    assert run.state == "waiting"
    assert run.eta_seconds is None
    assert run.steps_asked == 3000


def test_all_done() -> None:
    """Every replica done: the run is done, ETA 0."""
    run = combine("a", [_r(0, "done", 1000), _r(1, "done", 1000)], n_replicas=2)
    assert run.state == "done" and run.eta_seconds == 0.0


def test_durations() -> None:
    """Durations read as seconds, minutes and hours."""
    assert [format_duration(s) for s in (None, 42, 185, 3725)] == ["-", "42s", "3m05s", "1h02m"]
