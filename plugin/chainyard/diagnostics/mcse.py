"""Monte Carlo standard errors for one parameter, shape (chains, draws).

Vehtari, Gelman, Simpson, Carpenter and Buerkner (2021), Bayesian Analysis
16(2), Sec. 4.4 (MCSE of the mean, standard deviation and quantiles).
Constant input returns ``nan`` (no defined ESS); see :mod:`.ess`.
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt
from scipy import special  # not scipy.stats: 1 s of import for two functions

from ._validation import as_chains_draws, is_constant
from .ess import ess_mean, ess_quantile, ess_sd

#: Probabilities of a +/- 1 sd normal interval, used for the quantile MCSE.
_ONE_SIGMA = (float(special.ndtr(-1.0)), float(special.ndtr(1.0)))  # = scipy.stats.norm.cdf


def mcse_mean(x: npt.ArrayLike) -> float:
    """MCSE of the posterior mean: ``sd(x) / sqrt(ess_mean(x))``.

    Vehtari et al. (2021), Bayesian Analysis 16(2), Sec. 4.4.

    Parameters
    ----------
    x : array_like, shape (chains, draws)

    Returns
    -------
    float
    """
    arr = as_chains_draws(x)
    if is_constant(arr):
        return float("nan")
    return float(np.std(arr, ddof=1) / math.sqrt(ess_mean(arr)))


def mcse_sd(x: npt.ArrayLike) -> float:
    """MCSE of the posterior standard deviation by the delta method.

    ``Var(s^2) ~ Var((x - m)^2) / ESS[(x - m)^2]`` and
    ``mcse_sd = sqrt(Var(s^2)) / (2 s)`` (Vehtari et al. 2021, Bayesian
    Analysis 16(2), Sec. 4.4). Uses :func:`ess_sd`, the ESS of the squared
    deviations; ``arviz-stats`` 0.8 uses the ESS of ``x`` itself, so values
    differ when the two ESS differ.

    Parameters
    ----------
    x : array_like, shape (chains, draws)

    Returns
    -------
    float
    """
    arr = as_chains_draws(x)
    if is_constant(arr):
        return float("nan")
    sq = (arr - arr.mean()) ** 2
    evar = sq.mean()
    var_of_var = (np.mean(sq**2) - evar**2) / ess_sd(arr)
    return float(math.sqrt(var_of_var / evar / 4.0))


def mcse_quantile(x: npt.ArrayLike, q: float) -> float:
    """MCSE of the ``q`` quantile from a Beta interval on the ranks.

    With ``S_eff = ess_quantile(x, q)``, the 15.9% and 84.1% points of
    ``Beta(S_eff q + 1, S_eff (1 - q) + 1)`` are mapped to order statistics
    of the pooled draws; the MCSE is half their distance (Vehtari et al.
    2021, Bayesian Analysis 16(2), Sec. 4.4). ``nan`` when the quantile ESS is undefined
    (constant indicator).

    Parameters
    ----------
    x : array_like, shape (chains, draws)
    q : float
        Probability in (0, 1).

    Returns
    -------
    float
    """
    arr = as_chains_draws(x)
    if is_constant(arr):
        return float("nan")
    ess = ess_quantile(arr, q)
    if not np.isfinite(ess):
        return float("nan")
    lo, hi = quantile_interval_ranks(ess, q, arr.size)
    work = arr.flatten()
    work.partition((lo, hi))  # the two order statistics, no full sort
    return float((work[hi] - work[lo]) / 2.0)


def quantile_interval_ranks(ess: float, q: float, size: int) -> tuple[int, int]:
    """0-based order-statistic indices of the quantile MCSE interval.

    The 15.9% and 84.1% points of ``Beta(ess q + 1, ess (1 - q) + 1)``, scaled to ``size``
    pooled draws (Vehtari et al. 2021, Bayesian Analysis 16(2), Sec. 4.4).

    Parameters
    ----------
    ess : float
        ESS of the ``q`` quantile (finite).
    q : float
        Probability in (0, 1).
    size : int
        Number of pooled draws.

    Returns
    -------
    (int, int)
    """
    # the Beta quantile function, as scipy.stats.beta.ppf computes it (equal bit for bit)
    lo_p, hi_p = special.betaincinv(ess * q + 1.0, ess * (1.0 - q) + 1.0, np.array(_ONE_SIGMA))
    lo = math.floor(max(lo_p * size - 1.0, 0.0))
    hi = math.ceil(min(hi_p * size - 1.0, size - 1.0))
    return int(lo), int(hi)
