"""Integrated autocorrelation time of ensembles: analytic AR(1) and emcee agreement."""

from __future__ import annotations

import emcee
import numpy as np
import pytest
from scipy.signal import lfilter

from chainyard.diagnostics import (
    integrated_time,
    integrated_time_history,
    integrated_time_report,
    walkers_as_chains,
)


def ar1(rng: np.random.Generator, phi: float, chains: int, draws: int) -> np.ndarray:
    """Stationary unit-innovation AR(1) draws of shape (chains, draws)."""
    e = rng.standard_normal((chains, draws))
    e[:, 0] /= np.sqrt(1.0 - phi**2)
    return lfilter([1.0], [1.0, -phi], e, axis=1)


@pytest.mark.parametrize(
    ("phi", "draws"),
    [(0.5, 20_000), (0.9, 50_000), (0.99, 200_000)],
)
def test_integrated_time_matches_ar1_analytic(phi: float, draws: int) -> None:
    """Walker-averaged tau is within 10% of the AR(1) value for 32 walkers."""
    x = ar1(np.random.default_rng(11), phi, 32, draws)
    expected = (1 + phi) / (1 - phi)  # analytic: AR(1) tau = (1+phi)/(1-phi)
    # tolerance: spread over 5 seeds was <= 6.5% (phi=0.99); 10% is a stated margin
    assert integrated_time(x) == pytest.approx(expected, rel=0.10)


def test_integrated_time_matches_emcee() -> None:
    """Same estimator as emcee.autocorr.integrated_time to 1e-10 relative."""
    x = ar1(np.random.default_rng(3), 0.8, 16, 4_000)
    # reference library emcee 3.1.6 (Foreman-Mackey et al. 2013), layout (steps, walkers, dim)
    ref = emcee.autocorr.integrated_time(x.T[:, :, None], c=5, tol=0, quiet=True)[0]
    assert integrated_time(x, c=5.0) == pytest.approx(ref, rel=1e-10)


def test_walkers_as_chains_transposes_emcee_layout() -> None:
    """walkers_as_chains turns (steps, walkers) into the (walkers, steps) layout."""
    samples = np.arange(12.0).reshape(4, 3)
    np.testing.assert_array_equal(walkers_as_chains(samples), samples.T)


def test_report_flags_short_chain_as_unreliable() -> None:
    """steps < 50 tau is flagged with a message; long chains are reliable."""
    rng = np.random.default_rng(5)
    short = integrated_time_report(ar1(rng, 0.95, 16, 400))  # tau ~ 39 > 400 / 50
    assert not short.reliable
    assert "shorter than 50 x tau" in short.message
    long = integrated_time_report(ar1(rng, 0.5, 16, 5_000))  # tau = 3, 5000 > 150
    assert long.reliable and long.message == ""
    assert long.steps_per_tau == pytest.approx(long.draws / long.tau)
    assert long.window >= 5 * long.tau  # Sokal (1997): window M >= c tau(M)
    assert set(long.to_dict()) >= {"tau", "window", "draws", "steps_per_tau", "reliable"}


def test_constant_walkers_are_excluded() -> None:
    """A stuck (constant) walker is left out of the average and counted."""
    x = ar1(np.random.default_rng(2), 0.5, 8, 2_000)
    stuck = x.copy()
    stuck[0] = 1.5
    report = integrated_time_report(stuck)
    assert report.excluded_walkers == 1
    assert report.tau == pytest.approx(integrated_time(x[1:]), rel=1e-12)


def test_all_constant_gives_nan_and_unreliable() -> None:
    """An all-constant ensemble has undefined tau (nan) and is unreliable."""
    report = integrated_time_report(np.ones((4, 100)))
    assert np.isnan(report.tau) and not report.reliable


def test_history_lengths_increase_and_end_at_full_chain() -> None:
    """History gives increasing lengths ending at the full chain, tau equal there."""
    x = ar1(np.random.default_rng(9), 0.9, 8, 3_000)
    lengths, taus = integrated_time_history(x, n_points=6)
    assert lengths[-1] == 3_000 and np.all(np.diff(lengths) > 0)
    assert lengths.shape == taus.shape
    assert taus[-1] == pytest.approx(integrated_time(x))


@pytest.mark.parametrize(
    "bad",
    [np.ones(10), np.ones((2, 1)), np.array([[0.0, np.nan, 1.0, 2.0]])],
)
def test_invalid_input_raises(bad: np.ndarray) -> None:
    """1-D input, a single draw, or NaN raise ValueError."""
    with pytest.raises(ValueError):
        integrated_time(bad)
