"""Two-sample comparison of one parameter's draws with a reference run's.

Kolmogorov-Smirnov: the statistic ``D = sup |F_a - F_b|`` of the two empirical distribution
functions (Kolmogorov 1933; Smirnov 1948; computed by ``scipy.stats.ks_2samp``) and its
asymptotic p-value from the Kolmogorov distribution, ``P(K > sqrt(n m / (n + m)) D)``
(Smirnov 1948). MCMC draws are autocorrelated, so ``n`` and ``m`` are the effective sample
sizes (bulk ESS), not the draw counts (common practice, no source); for independent draws,
such as accept-reject, they are the draw counts. Energy distance (Szekely and Rizzo 2013,
J. Stat. Plann. Inference 143(8); ``scipy.stats.energy_distance``, the square root of their
statistic) is reported beside it as a scale-aware size of the difference, without a test.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import stats

__all__ = ["DEFAULT_ALPHA", "compare_samples"]

#: level below which a p-value counts as a difference (common practice, no source)
DEFAULT_ALPHA = 0.01


def compare_samples(
    a: npt.ArrayLike,
    b: npt.ArrayLike,
    n_effective: float | None = None,
    m_effective: float | None = None,
    alpha: float = DEFAULT_ALPHA,
) -> dict[str, Any]:
    """Kolmogorov-Smirnov test and energy distance between two samples of one quantity.

    Parameters
    ----------
    a, b : array_like
        The draws (any shape; flattened), e.g. a run's and the reference's.
    n_effective, m_effective : float, optional
        Effective sizes of ``a`` and ``b`` for the p-value (default: their sizes).
    alpha : float
        Level of the test.

    Returns
    -------
    dict
        ``ks_statistic``, ``ks_pvalue``, ``n_effective``, ``m_effective``,
        ``energy_distance``, ``alpha``, ``differs``.
    """
    x = np.asarray(a, dtype=np.float64).ravel()
    y = np.asarray(b, dtype=np.float64).ravel()
    if x.size < 2 or y.size < 2:
        raise ValueError("each sample needs at least 2 draws")
    n = float(min(n_effective or x.size, x.size))
    m = float(min(m_effective or y.size, y.size))
    d = float(stats.ks_2samp(x, y).statistic)
    p = float(stats.kstwobign.sf(np.sqrt(n * m / (n + m)) * d))
    return {
        "ks_statistic": d,
        "ks_pvalue": p,
        "n_effective": n,
        "m_effective": m,
        "energy_distance": float(stats.energy_distance(x, y)),
        "alpha": alpha,
        "differs": bool(p < alpha),
    }
