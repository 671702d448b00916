"""Frequentist calibration of mcse_mean over many seeds."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import lfilter
from scipy.stats import binom

from chainyard.diagnostics import mcse_mean

N_RUNS = 400


def ar1(rng: np.random.Generator, phi: float, chains: int, draws: int) -> np.ndarray:
    """Stationary unit-innovation AR(1) draws of shape (chains, draws)."""
    e = rng.standard_normal((chains, draws))
    e[:, 0] /= np.sqrt(1.0 - phi**2)
    return lfilter([1.0], [1.0, -phi], e, axis=1)


@pytest.mark.parametrize("phi", [0.0, 0.9])
def test_mean_pm_1645_mcse_covers_truth_90_percent(phi: float) -> None:
    """mean +/- 1.645 mcse covers the true mean 0 in ~90% of 400 independent runs."""
    rng = np.random.default_rng(2024)
    hits = 0
    for _ in range(N_RUNS):
        x = ar1(rng, phi, 4, 1_000)
        hits += abs(x.mean()) <= 1.645 * mcse_mean(x)
    # binomial tolerance: central 99.9% interval of Binomial(400, 0.9), i.e. about +/- 5%
    lo, hi = binom.interval(0.999, N_RUNS, 0.90)
    assert lo <= hits <= hi, f"coverage {hits / N_RUNS:.3f} outside [{lo / N_RUNS}, {hi / N_RUNS}]"
