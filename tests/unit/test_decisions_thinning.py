"""Thinning policies, including Owen (2017) cost-aware thinning vs brute force."""

from __future__ import annotations

import json

import numpy as np
import pytest

from chainyard.decisions import (
    ar1_efficiency,
    thin_cost_aware,
    thin_fixed,
    thin_from_tau,
    thin_none,
    thin_to_target,
)


def brute_force_best_k(rho: float, theta: float, k_max: int = 3_000) -> int:
    """argmin over k of cost * variance, with the thinned ACF summed term by term."""
    best_k, best = 1, np.inf
    for k in range(1, k_max + 1):
        lags = rho ** (k * np.arange(1, 200_000 // k + 2))  # direct sum, no closed form
        tau_k = 1.0 + 2.0 * lags.sum()
        value = (k + theta) * tau_k  # variance x cost per unit budget (Owen 2017 set-up)
        if value < best:
            best_k, best = k, value
    return best_k


def test_thin_none_is_default_and_cites_link_eaton() -> None:
    """thin_none keeps everything and its reason cites Link & Eaton 2012."""
    d = thin_none()
    assert d.factor == 1 and "Link & Eaton 2012" in d.reason


def test_thin_fixed_validates() -> None:
    """thin_fixed(k) keeps 1 in k steps; k < 1 or non-integer raise ValueError."""
    assert thin_fixed(5).factor == 5
    assert thin_fixed(5).reason.startswith("Kept 1 in every 5 steps")
    for bad in (0, -2, 2.5):
        with pytest.raises(ValueError):
            thin_fixed(bad)  # type: ignore[arg-type]


def test_thin_from_tau_uses_half_smallest_tau() -> None:
    """factor = floor(0.5 * min tau): taus 10 and 4.9 -> 2; tiny tau -> 1 (arithmetic)."""
    assert thin_from_tau({"a": 10.0, "b": 4.9}).factor == 2
    assert thin_from_tau([1.2, 1.5]).factor == 1
    assert thin_from_tau([30.0], fraction=1.0).factor == 30


def test_thin_to_target_keeps_at_least_target() -> None:
    """The factor leaves >= target draws: 10,000 steps x 32 walkers for 4,000 -> k = 80."""
    d = thin_to_target(10_000, 32, 4_000)
    assert d.factor == 80 and d.inputs["kept_draws"] == 4_000
    d2 = thin_to_target(9_999, 7, 1_000)
    assert 7 * len(range(0, 9_999, d2.factor)) >= 1_000
    assert thin_to_target(100, 10, 5_000).factor == 1


@pytest.mark.parametrize(
    ("rho", "theta"), [(0.5, 1.0), (0.9, 1.0), (0.9, 10.0), (0.99, 100.0), (0.7, 0.3)]
)
def test_owen_optimum_matches_brute_force(rho: float, theta: float) -> None:
    """Owen (2017) AR(1) optimum equals a brute-force search of variance x cost."""
    # independent check: term-by-term ACF sum instead of the closed form
    assert thin_cost_aware(rho, theta).factor == brute_force_best_k(rho, theta)


@pytest.mark.parametrize("rho", [0.2, 0.5, 0.9])
def test_owen_no_thinning_threshold(rho: float) -> None:
    """k = 1 is optimal iff theta <= (1 - rho)^2 / (2 rho) (Owen 2017, abstract)."""
    threshold = (1 - rho) ** 2 / (2 * rho)
    assert thin_cost_aware(rho, threshold * 0.99).factor == 1
    assert thin_cost_aware(rho, threshold * 1.01).factor >= 2


def test_owen_gain_bounded_and_trivial_cases() -> None:
    """Gain never exceeds 1 + theta (Owen 2017); rho <= 0 or theta = 0 means no thinning."""
    for rho, theta in [(0.99, 100.0), (0.9, 10.0), (0.5, 3.0)]:
        assert thin_cost_aware(rho, theta).inputs["efficiency_gain"] <= 1 + theta
    assert thin_cost_aware(-0.4, 50.0).factor == 1
    assert thin_cost_aware(0.95, 0.0).factor == 1  # Geyer (1992): thinning never helps
    assert ar1_efficiency([1], 0.8, 2.0)[0] == pytest.approx(1.0)


def test_owen_acf_input_agrees_with_ar1() -> None:
    """An exact AR(1) ACF array gives the same optimum as the scalar rho."""
    acf = 0.9 ** np.arange(5_000)
    assert thin_cost_aware(acf, 10.0).factor == thin_cost_aware(0.9, 10.0).factor


def test_owen_rejects_bad_input() -> None:
    """rho outside (-1, 1), negative theta, or a bad ACF raise ValueError."""
    for args in [(1.0, 1.0), (0.5, -1.0), (np.array([0.5, 0.2]), 1.0), (np.nan, 1.0)]:
        with pytest.raises(ValueError):
            thin_cost_aware(*args)


def test_thinning_to_dict_is_json() -> None:
    """Every thinning decision serialises with json.dumps and has the four fields."""
    for d in [
        thin_none(),
        thin_fixed(np.int64(3)),
        thin_from_tau(np.array([8.0])),
        thin_to_target(1_000, 8, 500),
        thin_cost_aware(np.float64(0.9), 5.0),
    ]:
        out = d.to_dict()
        json.dumps(out)
        assert set(out) == {"policy", "inputs", "factor", "reason"}
        assert type(out["factor"]) is int
