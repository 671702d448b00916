"""Burn-in policies: MSER-5, Geweke, tau multiples, fixed/fraction and the default rule."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.signal import lfilter

from chainyard.decisions import (
    BurnInDecision,
    burn_in_fixed,
    burn_in_fraction,
    burn_in_from_tau,
    burn_in_geweke,
    burn_in_mser,
    combine_burn_in,
    default_burn_in,
    geweke_z,
    mser_statistic,
)

PHI, START, WALKERS, STEPS = 0.95, 20.0, 32, 4_000


def ensemble_with_transient(seed: int) -> np.ndarray:
    """(steps, walkers) AR(1) walkers all started at +20, decaying as 20 * phi^t."""
    e = np.random.default_rng(seed).standard_normal((STEPS, WALKERS))
    e[0] = START
    return lfilter([1.0], [1.0, -PHI], e, axis=0)


def assert_builtin(obj: object) -> None:
    """Recursively check that only plain Python JSON types are present."""
    if isinstance(obj, dict):
        for k, v in obj.items():
            assert type(k) is str
            assert_builtin(v)
    elif isinstance(obj, list):
        for v in obj:
            assert_builtin(v)
    else:
        assert obj is None or type(obj) in (str, int, float, bool), type(obj)


def test_mser_statistic_matches_definition() -> None:
    """Vectorised MSER(d) equals the direct formula of White (1997) at every d."""
    y = np.random.default_rng(0).standard_normal(40) + 3.0
    direct = [np.sum((y[d:] - y[d:].mean()) ** 2) / (y.size - d) ** 2 for d in range(y.size)]
    np.testing.assert_allclose(mser_statistic(y), direct, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5])
def test_mser5_cut_is_past_injected_transient(seed: int) -> None:
    """MSER-5 cuts past a +20 transient (residual bias << MCSE) but not wildly late."""
    x = ensemble_with_transient(seed)
    decision = burn_in_mser(x)
    cut = decision.steps_discarded
    assert cut % 5 == 0  # MSER-5 works on batches of 5 (White, Cobb & Spratt 2000)
    # analytic: walker-mean transient 20 * phi^t; stationary sd of walker mean
    sd = 1 / np.sqrt(WALKERS * (1 - PHI**2))
    t_one_sd = np.log(START / sd) / -np.log(PHI)  # ~70 steps
    tail = START * PHI ** np.arange(cut, STEPS)
    bias = tail.sum() / (STEPS - cut)
    mcse = sd * np.sqrt((1 + PHI) / (1 - PHI) / (STEPS - cut))  # analytic AR(1) MCSE
    assert cut > 0.5 * t_one_sd
    assert bias < 0.2 * mcse
    assert cut < 4 * t_one_sd  # not wildly late
    assert decision.reason.startswith(f"Discarded {cut:,} of 4,000 steps: MSER-5 minimum")


def test_mser_uses_walker_mean_of_2d_input() -> None:
    """A (steps, walkers) trace gives the same cut as its walker-mean trace."""
    x = ensemble_with_transient(7)
    assert burn_in_mser(x).steps_discarded == burn_in_mser(x.mean(axis=1)).steps_discarded


def test_mser_reports_minimum_at_limit() -> None:
    """A trace still drifting at half-way hits the limit and the reason says 'run longer'."""
    y = np.linspace(10.0, 0.0, 1_000) + 0.01 * np.random.default_rng(8).standard_normal(1_000)
    decision = burn_in_mser(y)
    assert decision.inputs["at_limit"] and "run longer" in decision.reason
    assert decision.steps_discarded == 500


def test_mser_too_short_raises() -> None:
    """Fewer than 4 batches raise ValueError."""
    with pytest.raises(ValueError, match="at least 4 batches"):
        burn_in_mser(np.zeros(19))


def test_geweke_detects_transient_and_passes_after_it() -> None:
    """Geweke |z| is large at cut 0 with a transient and below 1.96 at the chosen cut."""
    x = ensemble_with_transient(9)
    decision = burn_in_geweke(x)
    assert abs(decision.inputs["z_scores"][0]) > 1.96  # Geweke 1992 two-sided 5%
    assert decision.steps_discarded > 0 and decision.inputs["passed"]


def test_geweke_z_is_calibrated_on_stationary_chains() -> None:
    """On stationary AR(1) chains |z| < 1.96 in ~95% of 300 runs (Geweke 1992 null N(0,1))."""
    rng = np.random.default_rng(10)
    e = rng.standard_normal((300, 2_000))
    e[:, 0] /= np.sqrt(1 - 0.5**2)
    x = lfilter([1.0], [1.0, -0.5], e, axis=1)
    inside = np.mean([abs(geweke_z(row)) < 1.96 for row in x])
    # binomial tolerance: sd sqrt(.95*.05/300) = 1.3%; accept 0.90-0.99 (about 4 sd low)
    assert 0.90 <= inside <= 0.99


def test_burn_in_from_tau_arithmetic() -> None:
    """ceil(multiple * max tau): 2 x 35.5 = 71 and 2.5 x 40 = 100 (arithmetic)."""
    d = burn_in_from_tau({"a": 10.2, "b": 35.5, "c": 20.0}, 2.0, 20_000)
    assert d.steps_discarded == 71 and d.inputs["tau_max"] == 35.5
    assert d.reason == ("Discarded 71 of 20,000 steps: 2 x max autocorrelation time (35.5).")
    assert burn_in_from_tau([40.0], 2.5, 1_000).steps_discarded == 100
    assert burn_in_from_tau([10.1], 3, 1_000).steps_discarded == 31  # ceil(30.3)


def test_burn_in_from_tau_rejects_bad_input() -> None:
    """NaN tau, non-positive multiple, or a cut that leaves nothing raise ValueError."""
    with pytest.raises(ValueError):
        burn_in_from_tau([np.nan], 2, 100)
    with pytest.raises(ValueError):
        burn_in_from_tau([5.0], 0, 100)
    with pytest.raises(ValueError, match="leaving nothing"):
        burn_in_from_tau([60.0], 2, 100)


def test_fixed_and_fraction() -> None:
    """Fixed and fraction policies do the obvious arithmetic and validate input."""
    assert burn_in_fixed(1_200, 20_000).reason.startswith("Discarded 1,200 of 20,000 steps")
    assert burn_in_fraction(0.25, 1_001).steps_discarded == 250
    with pytest.raises(ValueError):
        burn_in_fixed(100, 100)
    with pytest.raises(ValueError):
        burn_in_fraction(1.0, 100)


def test_default_takes_larger_of_mser_and_tau() -> None:
    """Default = max(MSER-5 cut, ceil(2 max tau)), capped at half the run."""
    x = ensemble_with_transient(11)
    mser_cut = burn_in_mser(x).steps_discarded
    assert default_burn_in(x).steps_discarded == mser_cut
    small = default_burn_in(x, {"a": 5.0})
    assert small.steps_discarded == max(mser_cut, 10)
    big = default_burn_in(x, {"a": 400.0})
    assert big.steps_discarded == 800 and "2 x max tau (800)" in big.reason
    capped = default_burn_in(x, [1_500.0])
    assert capped.steps_discarded == 2_000 and "capped at 50%" in capped.reason


def test_combine_takes_max() -> None:
    """combine_burn_in keeps the largest cut and records all components."""
    parts = [burn_in_fixed(10, 1_000), burn_in_fixed(30, 1_000), burn_in_fraction(0.02, 1_000)]
    combined = combine_burn_in(parts, 1_000)
    assert combined.steps_discarded == 30 and len(combined.inputs["components"]) == 3


def test_decisions_serialise_to_plain_json() -> None:
    """to_dict() contains only builtin types and json.dumps succeeds for every policy."""
    x = ensemble_with_transient(12)
    decisions: list[BurnInDecision] = [
        burn_in_mser(x),
        burn_in_geweke(x),
        burn_in_from_tau(np.array([3.0, 4.0]), np.float64(2.0), np.int64(1_000)),
        default_burn_in(x, {"a": np.float32(5.0)}),
        burn_in_fixed(np.int64(5), 100),
    ]
    for d in decisions:
        out = d.to_dict()
        assert_builtin(out)
        json.dumps(out)
        assert set(out) == {"policy", "inputs", "steps_discarded", "reason"}
        assert out["reason"].count(".") >= 1 and out["reason"].endswith(".")
