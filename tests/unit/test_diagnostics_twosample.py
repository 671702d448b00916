"""Two-sample comparison against scipy.stats (the reference implementation here)."""

from __future__ import annotations

import numpy as np
from scipy import stats

from chainyard.diagnostics.twosample import compare_samples


def test_statistics_equal_scipy() -> None:
    """D is scipy's ks_2samp statistic; energy distance is scipy's; the p-value is the
    asymptotic Kolmogorov tail at sqrt(nm/(n+m)) D (scipy.stats.kstwobign)."""
    rng = np.random.default_rng(1)
    a, b = rng.normal(size=800), rng.normal(0.1, 1.0, size=600)
    res = compare_samples(a, b)
    assert res["ks_statistic"] == stats.ks_2samp(a, b).statistic
    assert res["energy_distance"] == stats.energy_distance(a, b)
    en = 800 * 600 / 1400
    assert np.isclose(res["ks_pvalue"], stats.kstwobign.sf(np.sqrt(en) * res["ks_statistic"]))
    # the asymptotic p-value is close to scipy's own two-sample asymptotic one
    assert abs(res["ks_pvalue"] - stats.ks_2samp(a, b, method="asymp").pvalue) < 0.02


def test_effective_sizes_widen_the_test() -> None:
    """Fewer effective draws: the same D gives a larger p-value."""
    rng = np.random.default_rng(2)
    a, b = rng.normal(size=4000), rng.normal(0.08, 1.0, size=4000)
    full = compare_samples(a, b)
    few = compare_samples(a, b, n_effective=400, m_effective=400)
    assert full["differs"] and few["ks_pvalue"] > full["ks_pvalue"]


def test_same_distribution_rarely_differs() -> None:
    """Under the null the test flags about alpha of pairs (alpha = 0.01; 200 pairs)."""
    rng = np.random.default_rng(3)
    flags = [
        compare_samples(rng.normal(size=300), rng.normal(size=300))["differs"] for _ in range(200)
    ]
    assert sum(flags) <= 8  # binomial(200, 0.01): P(>= 9) < 0.001
