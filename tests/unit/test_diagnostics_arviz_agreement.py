"""Agreement with the reference library arviz-stats (array interface) to 1e-6 relative."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import lfilter

from chainyard.diagnostics import (
    ess_bulk,
    ess_mean,
    ess_quantile,
    ess_tail,
    mcse_mean,
    mcse_quantile,
    rhat,
    rhat_bulk,
    rhat_folded,
)

# The top-level arviz_stats functions need xarray (not installed); the array-level
# interface takes numpy arrays of shape (chains, draws) directly.
array_stats = pytest.importorskip("arviz_stats.base").array_stats

REL = 1e-6

CASES = [(0.0, 4, 400, 0), (0.5, 4, 1_001, 1), (0.9, 2, 3_000, 2), (0.99, 6, 2_000, 3)]


def ar1(rng: np.random.Generator, phi: float, chains: int, draws: int) -> np.ndarray:
    """Stationary unit-innovation AR(1) draws of shape (chains, draws)."""
    e = rng.standard_normal((chains, draws))
    e[:, 0] /= np.sqrt(1.0 - phi**2)
    return lfilter([1.0], [1.0, -phi], e, axis=1)


@pytest.fixture(params=CASES, ids=lambda c: f"phi{c[0]}-c{c[1]}-n{c[2]}")
def draws(request: pytest.FixtureRequest) -> np.ndarray:
    """AR(1) draws with a mild shift in chain 0."""
    phi, chains, n, seed = request.param
    x = ar1(np.random.default_rng(seed), phi, chains, n)
    x[0] += 0.3  # a mild between-chain difference so R-hat is not trivially 1
    return x


def test_rhat_agrees(draws: np.ndarray) -> None:
    """rhat / rhat_bulk / rhat_folded equal arviz-stats rank / z_scale / folded."""
    # reference library arviz-stats 0.8 (array_stats.rhat)
    assert rhat(draws) == pytest.approx(array_stats.rhat(draws, method="rank"), rel=REL)
    assert rhat_bulk(draws) == pytest.approx(array_stats.rhat(draws, method="z_scale"), rel=REL)
    assert rhat_folded(draws) == pytest.approx(array_stats.rhat(draws, method="folded"), rel=REL)


def test_ess_agrees(draws: np.ndarray) -> None:
    """ess_bulk, ess_tail, ess_mean and ess_quantile equal arviz-stats."""
    # reference library arviz-stats 0.8 (array_stats.ess)
    assert ess_bulk(draws) == pytest.approx(array_stats.ess(draws, method="bulk"), rel=REL)
    ref_tail = array_stats.ess(draws, method="tail", prob=(0.05, 0.95))
    assert ess_tail(draws) == pytest.approx(ref_tail, rel=REL)
    assert ess_mean(draws) == pytest.approx(array_stats.ess(draws, method="mean"), rel=REL)
    ref_q = array_stats.ess(draws, method="quantile", prob=0.3)
    assert ess_quantile(draws, 0.3) == pytest.approx(ref_q, rel=REL)


@pytest.mark.parametrize("q", [0.05, 0.5, 0.9])
def test_mcse_agrees(draws: np.ndarray, q: float) -> None:
    """mcse_mean and mcse_quantile equal arviz-stats."""
    # reference library arviz-stats 0.8 (array_stats.mcse)
    assert mcse_mean(draws) == pytest.approx(array_stats.mcse(draws, method="mean"), rel=REL)
    ref_q = array_stats.mcse(draws, method="quantile", prob=q)
    assert mcse_quantile(draws, q) == pytest.approx(ref_q, rel=REL)
