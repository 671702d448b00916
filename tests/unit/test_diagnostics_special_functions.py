"""The quantile functions the diagnostics take from ``scipy.special`` equal what
``scipy.stats`` computes, bit for bit (scipy.stats is the reference here, used only in
tests; the package avoids its second of import time)."""

from __future__ import annotations

import numpy as np
from scipy import stats

from chainyard.diagnostics import mcse
from chainyard.diagnostics.multivariate import _chi2_ppf


def test_one_sigma_probabilities_are_the_normal_cdf() -> None:
    """The 15.9% and 84.1% points: scipy.stats.norm.cdf(-1), cdf(1)."""
    assert (float(stats.norm.cdf(-1.0)), float(stats.norm.cdf(1.0))) == mcse._ONE_SIGMA


def test_beta_quantiles_equal_scipy_stats() -> None:
    """The order-statistic interval of the quantile MCSE (Vehtari et al. 2021, Sec. 4.4) from
    scipy.stats.beta.ppf, over ESS 1..1e5 and q in (0, 1)."""
    rng = np.random.default_rng(7)
    for _ in range(2000):
        ess, q, size = rng.uniform(1.0, 1e5), rng.uniform(1e-3, 1 - 1e-3), 4000
        lo_p, hi_p = stats.beta.ppf(mcse._ONE_SIGMA, ess * q + 1.0, ess * (1.0 - q) + 1.0)
        lo = int(np.floor(max(lo_p * size - 1.0, 0.0)))
        hi = int(np.ceil(min(hi_p * size - 1.0, size - 1.0)))
        assert mcse.quantile_interval_ranks(ess, q, size) == (lo, hi)


def test_chi2_quantile_equals_scipy_stats() -> None:
    """The chi-square quantile of the multivariate ESS bound (Vats et al. 2019)."""
    for p in range(1, 300):
        for alpha in (0.001, 0.01, 0.05, 0.1, 0.2, 0.5):
            assert _chi2_ppf(1.0 - alpha, p) == float(stats.chi2.ppf(1.0 - alpha, p))
