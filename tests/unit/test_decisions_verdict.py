"""Convergence verdict: targets, failing numbers in messages, JSON output."""

from __future__ import annotations

import json

import numpy as np
import pytest

from chainyard.decisions import Targets, assess
from chainyard.diagnostics import (
    ensemble_to_chains,
    ess_bulk,
    ess_tail,
    integrated_time_report,
    rhat,
)


def diagnose(replicas: list[np.ndarray]) -> dict[str, float]:
    """Diagnostics for one parameter from (steps, walkers) replicas."""
    chains = ensemble_to_chains(replicas)
    pooled = ensemble_to_chains(replicas, mode="walkers")
    tau = integrated_time_report(replicas[0].T)
    return {
        "rhat": rhat(chains),
        "ess_bulk": ess_bulk(pooled),
        "ess_tail": ess_tail(pooled),
        "steps_per_tau": tau.steps_per_tau,
    }


def test_iid_replicas_pass() -> None:
    """Four agreeing iid replicas pass the default targets (Vehtari et al. 2021 thresholds)."""
    rng = np.random.default_rng(0)
    reps = [rng.standard_normal((2_000, 16)) for _ in range(4)]
    verdict = assess({"m": diagnose(reps), "s": diagnose(reps[::-1])})
    assert verdict.ok, verdict.lines
    assert verdict.lines[0].startswith("Overall: ok")


def test_shifted_replica_fails_with_number_in_message() -> None:
    """A replica shifted by 1 sd fails on R-hat and the line shows the value vs 1.01."""
    rng = np.random.default_rng(1)
    reps = [rng.standard_normal((2_000, 16)) for _ in range(4)]
    reps[2] = reps[2] + 1.0
    diag = diagnose(reps)
    verdict = assess({"m": diag})
    assert not verdict.ok
    check = verdict.params["m"]
    assert not check.ok and check.failures[0].startswith("rhat ")
    assert f"{diag['rhat']:.3g}" in verdict.lines[1] and "> 1.01" in verdict.lines[1]


def test_each_target_reports_its_failing_number() -> None:
    """Low ESS and too few steps per tau each produce a 'value < limit' failure."""
    verdict = assess(
        {"a": {"rhat": 1.001, "ess_bulk": 120.0, "ess_tail": 390.0, "tau": 40.0, "draws": 1000}}
    )
    fails = verdict.params["a"].failures
    assert fails == ("ess_bulk 120 < 400", "ess_tail 390 < 400", "steps_per_tau 25 < 50")


def test_missing_or_nan_fails_and_none_disables() -> None:
    """A missing or NaN diagnostic fails; a target set to None is skipped."""
    v = assess({"a": {"rhat": float("nan"), "ess_bulk": 500.0, "ess_tail": 500.0}})
    assert v.params["a"].failures == ("rhat is nan", "steps_per_tau missing")
    relaxed = Targets(min_steps_per_tau=None, max_rhat=None)
    assert assess({"a": {"ess_bulk": 500.0, "ess_tail": 500.0}}, relaxed).ok


def test_multivariate_ess_target() -> None:
    """mESS below min_ess(p, alpha, eps) fails; above passes (Vats et al. 2019)."""
    diag = {"a": {"rhat": 1.0, "ess_bulk": 1e4, "ess_tail": 1e4, "steps_per_tau": 100.0}}
    targets = Targets(mess_eps=0.05)
    assert not assess(diag, targets, multivariate_ess=5_000.0).ok  # need 6147 for p = 1
    assert assess(diag, targets, multivariate_ess=7_000.0).ok
    assert not assess(diag, targets).ok  # missing mESS
    assert (
        assess(diag, targets, multivariate_ess=7_000.0, n_params=2).multivariate["required"]
        == 7_530
    )


def test_verdict_to_dict_is_json() -> None:
    """Verdict.to_dict() is json.dumps-able with numpy inputs."""
    verdict = assess(
        {
            "a": {
                "rhat": np.float64(1.2),
                "ess_bulk": np.int64(50),
                "ess_tail": np.float32(900),
                "steps_per_tau": np.float64(80),
            }
        },
        Targets(mess_eps=0.1),
        multivariate_ess=np.float64(3_000),
    )
    text = json.dumps(verdict.to_dict())
    assert '"ok": false' in text


def test_empty_input_raises() -> None:
    """An empty diagnostics mapping raises ValueError."""
    with pytest.raises(ValueError):
        assess({})
