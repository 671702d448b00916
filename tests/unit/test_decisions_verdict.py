"""Convergence verdict: targets, failing numbers in messages, JSON output."""

from __future__ import annotations

import json

import numpy as np
import pytest

from chainyard.decisions import Targets, assess
from chainyard.decisions.targets import long_run_tau, steps_needed
from chainyard.diagnostics import (
    ensemble_to_chains,
    ess_bulk,
    ess_tail,
    integrated_time,
    integrated_time_report,
    rhat,
)
from chainyard.diagnostics.nested import nested_rhat


def diagnose(replicas: list[np.ndarray]) -> dict[str, float]:
    """Diagnostics for one parameter from (steps, walkers) replicas."""
    chains = ensemble_to_chains(replicas)
    pooled = ensemble_to_chains(replicas, mode="walkers")
    tau = integrated_time_report(replicas[0].T)
    half = replicas[0].shape[0] // 2
    return {
        "rhat_nested": nested_rhat(pooled, len(replicas)),
        "rhat": rhat(chains),
        "ess_bulk": ess_bulk(pooled),
        "ess_tail": ess_tail(pooled),
        "steps_per_tau": tau.steps_per_tau,
        "tau_growth": tau.tau / integrated_time(replicas[0][:half].T),
        "rhat_tail": _tail_rhat(replicas),
    }


def _tail_rhat(replicas: list[np.ndarray]) -> float:
    """Split R-hat of each replica's share of draws in the pooled 5% / 95% tails."""
    q05, q95 = np.quantile(np.concatenate(replicas), (0.05, 0.95))
    lower = np.stack([(r <= q05).mean(axis=1) for r in replicas])
    upper = np.stack([(r >= q95).mean(axis=1) for r in replicas])
    return max(rhat(lower), rhat(upper))


def test_iid_replicas_pass() -> None:
    """Four agreeing iid replicas pass the default targets (Vehtari et al. 2021 thresholds)."""
    rng = np.random.default_rng(0)
    reps = [rng.standard_normal((2_000, 16)) for _ in range(4)]
    verdict = assess({"m": diagnose(reps), "s": diagnose(reps[::-1])})
    assert verdict.ok, verdict.lines
    assert verdict.lines[0].startswith("Overall: ok")


def test_shifted_replica_fails_mixing_with_number_in_message() -> None:
    """A replica shifted by 1 sd fails nested R-hat (mixing) and the line shows value vs 1.01."""
    rng = np.random.default_rng(1)
    reps = [rng.standard_normal((2_000, 16)) for _ in range(4)]
    reps[2] = reps[2] + 1.0
    diag = diagnose(reps)
    verdict = assess({"m": diag})
    assert not verdict.ok
    check = verdict.params["m"]
    assert not check.ok and check.failures[0].startswith("rhat_nested ")
    assert check.checks == {"mixing": False, "tau": True, "precision": True}
    assert verdict.checks["mixing"] is False
    assert f"{diag['rhat_nested']:.4f}" in verdict.lines[1] and "> 1.01" in verdict.lines[1]
    assert any("more steps may not help" in line for line in verdict.lines)


def test_classic_rhat_reported_but_gates_only_when_set() -> None:
    """Classic R-hat 1.03 fails only with max_rhat set (default None: reported, not gating)."""
    diag = {
        "rhat_nested": 1.001,
        "rhat_tail": 1.01,
        "rhat": 1.03,
        "ess_bulk": 1e4,
        "ess_tail": 1e4,
        "steps_per_tau": 100.0,
        "tau_growth": 1.05,
    }
    assert assess({"a": diag}).ok
    strict = assess({"a": diag}, Targets(max_rhat=1.01))
    assert strict.params["a"].failures == ("rhat 1.0300 > 1.01",)
    assert strict.params["a"].checks["mixing"] is False


def test_each_target_reports_its_failing_number() -> None:
    """Low ESS, too few steps per tau and a growing tau each produce a failure line."""
    verdict = assess(
        {
            "a": {
                "rhat_nested": 1.001,
                "rhat_tail": 1.01,
                "ess_bulk": 120.0,
                "ess_tail": 390.0,
                "tau": 40.0,
                "draws": 1000,
                "tau_growth": 1.6,
            }
        }
    )
    fails = verdict.params["a"].failures
    assert fails == (
        "steps_per_tau 25 < 50",
        "tau_growth 1.60 > 1.3",
        "ess_bulk 120 < 400",
        "ess_tail 390 < 400",
    )
    assert verdict.params["a"].checks == {"mixing": True, "tau": False, "precision": False}
    assert "tau: still growing or too few steps per tau: run longer." in verdict.lines


def test_steps_needed_from_ess_and_tau() -> None:
    """ESS in proportion to steps; tau corrected for its low bias; each times the margin 1.25."""
    targets = Targets()
    diag = {"ess_bulk": 120.0, "ess_tail": 390.0, "tau": 40.0}
    # arithmetic by hand: 1000 * 400 / 120 * 1.25 = 4166.7 -> 4167; long-run tau
    # 40 / (1 - 10 * 40 / 1000) = 66.67, and (50 - 10) * 66.67 * 1.25 = 3333.3 -> 3334
    assert steps_needed(diag, targets, 1000, {"ess_bulk", "ess_tail"}) == 4167
    assert steps_needed(diag, targets, 1000, {"steps_per_tau"}) == 3334
    # growth: 10 * (2 - 1.2) * 66.67 / 0.2 * 1.25 = 3333.3 -> 3334
    assert steps_needed(diag, targets, 1000, {"tau_growth"}) == 3334
    assert steps_needed(diag, targets, 1000, {"rhat_nested"}) is None  # mixing: no estimate
    verdict = assess({"a": {**diag, "rhat_nested": 1.0, "steps_per_tau": 25.0}}, steps=1000)
    assert verdict.params["a"].steps_needed == 4167
    assert verdict.more_steps == 3167
    assert verdict.to_dict()["more_steps"] == 3167
    assert any("about 3,167 more" in line for line in verdict.lines)


def test_steps_needed_corrects_the_low_tau_estimate() -> None:
    """tau 20 on 1,000 steps is 25 long-run; a run too short to correct gets twice its length."""
    targets = Targets()
    assert long_run_tau(20.0, 1000) == 25.0  # 20 / (1 - 10 * 20 / 1000), by hand
    # (50 - 10) * 25 * 1.25 = 1,250: more than the uncorrected 50 * 20 = 1,000
    assert steps_needed({"tau": 20.0}, targets, 1000, {"steps_per_tau"}) == 1250
    assert long_run_tau(60.0, 1000) is None  # 1 - 600 / 1000 = 0.4: correction above 2
    assert steps_needed({"tau": 60.0}, targets, 1000, {"steps_per_tau"}) == 2500  # 2 x 1.25
    assert long_run_tau(float("nan"), 1000) is None


def test_missing_or_nan_fails_and_none_disables() -> None:
    """A missing or NaN diagnostic fails; a target set to None is skipped."""
    v = assess(
        {"a": {"rhat_nested": float("nan"), "ess_bulk": 500.0, "ess_tail": 500.0}},
        Targets(max_tau_growth=None),
    )
    assert v.params["a"].failures == (
        "rhat_nested is nan",
        "rhat_tail missing",
        "steps_per_tau missing",
    )
    relaxed = Targets(
        min_steps_per_tau=None, max_nested_rhat=None, max_tau_growth=None, max_tail_rhat=None
    )
    assert assess({"a": {"ess_bulk": 500.0, "ess_tail": 500.0}}, relaxed).ok


def test_multivariate_ess_target() -> None:
    """mESS below min_ess(p, alpha, eps) fails; above passes (Vats et al. 2019)."""
    diag = {
        "a": {
            "rhat_nested": 1.0,
            "rhat_tail": 1.0,
            "ess_bulk": 1e4,
            "ess_tail": 1e4,
            "steps_per_tau": 100.0,
            "tau_growth": 1.0,
        }
    }
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


def test_stuck_walker_fails_mixing() -> None:
    """A stuck walker fails the run (mixing), even with every per-parameter number fine."""
    diag = {
        "a": {
            "rhat_nested": 1.0,
            "rhat_tail": 1.0,
            "ess_bulk": 1e4,
            "ess_tail": 1e4,
            "steps_per_tau": 100.0,
            "tau_growth": 1.0,
        }
    }
    assert assess(diag, stuck_walkers={0: [], 1: []}).ok
    verdict = assess(diag, stuck_walkers={0: [3], 2: [1, 5]})
    assert not verdict.ok and verdict.checks["mixing"] is False
    assert verdict.lines[0].startswith("Overall: FAIL (0 of 1 parameters failed; stuck walkers")
    assert (
        "FAIL: stuck walkers (acceptance far below their ensemble's and they barely move): "
        "replica 0: walker 3; replica 2: walkers 1, 5"
    ) in verdict.lines
    assert verdict.to_dict()["stuck_walkers"] == {"0": [3], "2": [1, 5]}


def test_diagnose_arrays_fails_a_run_with_a_stuck_walker() -> None:
    """diagnose_arrays with acceptance flags: a walker accepting 1% among 60% that barely
    moves is stuck; one that moves as much as the others holds a minority region."""
    from chainyard.analysis.diagnose import diagnose_arrays

    rng = np.random.default_rng(9)
    draws = rng.standard_normal((4, 400, 16, 2))
    accepted = rng.random((4, 400, 16)) < 0.6
    assert diagnose_arrays(draws, accepted=accepted)["verdict"]["ok"]
    accepted[1, :, 7] = rng.random(400) < 0.01
    moving = diagnose_arrays(draws, accepted=accepted)["verdict"]
    assert not moving["ok"] and moving["minority_walkers"] == {"1": [7]}
    assert not moving["stuck_walkers"]
    assert any("walkers in a minority region" in line for line in moving["lines"])
    draws[1, :, 7] = draws[1, 0, 7] + 0.01 * rng.standard_normal((400, 2))  # barely moves
    verdict = diagnose_arrays(draws, accepted=accepted)["verdict"]
    assert not verdict["ok"] and verdict["stuck_walkers"] == {"1": [7]}
    assert not verdict["minority_walkers"]


def test_slow_independent_chain_is_judged_by_its_own_ess() -> None:
    """Metropolis-Hastings: a chain accepting 0.08 among 0.22 whose own ESS meets its share
    of the target is reported as slow, not stuck; one that never moves is stuck."""
    from chainyard.analysis.diagnose import diagnose_arrays

    rng = np.random.default_rng(4)
    replicas, steps, chains = 4, 2000, 8
    draws = rng.standard_normal((replicas, steps, chains, 2))  # independent draws: ESS ~ steps
    accepted = rng.random((replicas, steps, chains)) < 0.22
    accepted[2, :, 5] = rng.random(steps) < 0.08
    result = diagnose_arrays(draws, accepted=accepted, kind="metropolis_hastings")
    verdict = result["verdict"]
    assert verdict["ok"], verdict["lines"]
    (slow,) = verdict["slow_chains"]["2"]
    assert slow["chain"] == 5 and slow["own_ess_bulk"] >= slow["required"] == 400 / 32
    assert any("chain 5 is slow, not stuck" in line for line in verdict["lines"])
    draws[2, :, 5] = draws[2, 0, 5]  # never moves
    accepted[2, :, 5] = False
    verdict = diagnose_arrays(draws, accepted=accepted, kind="metropolis_hastings")["verdict"]
    assert not verdict["ok"] and verdict["stuck_walkers"] == {"2": [5]}


def test_one_replica_says_what_was_not_checked() -> None:
    """One replica: mixing reads 'ok within one replica only' and 4 replicas are advised."""
    from chainyard.analysis.diagnose import diagnose_arrays, format_table

    rng = np.random.default_rng(2)
    result = diagnose_arrays(rng.standard_normal((1, 2000, 16, 2)))
    lines = result["verdict"]["lines"]
    assert "mixing ok within one replica only" in lines[0]
    assert any("Run 4 replicas" in line for line in lines)
    assert "halves" in result["what_each_check_compares"]["rhat_nested"]
    assert "Run 4 replicas" in format_table(result)
    four = diagnose_arrays(rng.standard_normal((4, 2000, 16, 2)))["verdict"]["lines"]
    assert not any("replica only" in line or "Run 4 replicas" in line for line in four)


def test_accept_reject_draws_are_not_held_to_the_tau_checks() -> None:
    """Exact independent draws (accept-reject): 30 per chain pass; the same draws judged as an
    ensemble fail the 50-steps-per-tau rule (tau of independent draws is 1: analytic)."""
    from chainyard.analysis.diagnose import diagnose_arrays

    draws = np.random.default_rng(3).standard_normal((4, 30, 8, 2))
    exact = diagnose_arrays(draws, kind="accept_reject")
    assert exact["verdict"]["ok"], exact["verdict"]["lines"]
    assert exact["params"]["x0"]["ess_bulk"] == 4 * 30 * 8  # independent draws: ESS is N
    as_ensemble = diagnose_arrays(draws)
    assert not as_ensemble["verdict"]["ok"]
    failures = [f for p in as_ensemble["verdict"]["params"].values() for f in p["failures"]]
    assert any(f.startswith("steps_per_tau") for f in failures), failures
