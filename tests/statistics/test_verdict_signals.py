"""Reduced CI version of the verdict studies of issues 25 and 18 (full versions:
``tests/benchmarks/bench_verdict.py``, ``bench_funnel_signals.py``, ``bench_steps_needed.py``;
results in ``tests/benchmarks/RESULTS.md``).

* the heavy-tailed Metropolis-Hastings case (5-D Student-t, 5 dof; 4 replicas x 8 chains,
  per-chain adapted proposals; 380 steps per tau): healthy runs, judged ok (the study: at
  most 1 false alarm in 24);
* centred eight schools (a funnel) is failed by the tail R-hat on its own, independently of
  tau growth (the study: 11 of 11 runs at 16,000 steps; not the one run at 64,000), and by
  the tail move ratio on its own;
* "steps still needed", followed once from 20 steps per tau, makes healthy runs pass.

Seeds are fixed; each assertion is the study's finding on a few of its own seeds.
"""

from __future__ import annotations

import pytest

from tests.statistics.runs import steps_for
from tests.statistics.study import run_cell

pytestmark = pytest.mark.slow


def test_heavy_tailed_mh_runs_are_not_false_alarms() -> None:
    """Student-t MH at 380 steps per tau: no FAIL on these seeds (study: <= 1 in 24)."""
    family = "healthy/student_t5_mh"
    cell = run_cell(family, steps_for(family, 380), range(3))
    assert cell.failed == 0, cell.examples(ok=False, k=3)
    assert cell.biased == 0


def test_funnel_fails_on_the_tail_rhat_alone() -> None:
    """Centred eight schools: the tail R-hat exceeds its limit (second, independent signal)."""
    cell = run_cell("eight_schools", 2000, range(1))
    (run,) = cell.runs
    assert not run.ok
    assert "rhat_tail" in run.checks, run.lines


def test_funnel_fails_on_the_tail_move_ratio_alone() -> None:
    """Centred eight schools: moves out of log-tau's lowest 5% are rare (the funnel's neck),
    a third signal independent of tau growth and of the tail R-hat, which, unlike them,
    does not fade as the run grows (the study: every run at 16,000 and 64,000 steps)."""
    cell = run_cell("eight_schools", 4000, range(1))
    (run,) = cell.runs
    assert not run.ok
    assert "tail_move_ratio" in run.checks, run.lines
    assert run.stats["tail_move_ratio"] is not None and run.stats["tail_move_ratio"] < 0.35


def test_following_steps_needed_once_passes() -> None:
    """A healthy run failed at 20 steps per tau passes once extended by its suggestion, and
    the suggestion is not far beyond the shortest passing length (study: >= 80% pass)."""
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
    from bench_steps_needed import one

    for seed in (0, 1):
        row = one("healthy/gauss4_corr", seed, start=20.0, longest=100.0)
        assert not row["ok_at_start"] and row["ok_after"], row
        assert row["overshoot"] is not None and row["overshoot"] <= 1.5, row
