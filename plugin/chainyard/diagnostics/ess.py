"""Effective sample size (ESS) for one parameter, shape (chains, draws).

Implements the multi-chain ESS of Vehtari, Gelman, Simpson, Carpenter and
Buerkner (2021), "Rank-normalization, folding, and localization: an improved
R-hat for assessing convergence of MCMC", Bayesian Analysis 16(2), 667-718,
with Geyer's (1992) initial monotone sequence truncation as implemented in
Stan. Values agree with ``arviz-stats`` to floating-point precision.

Chains must be independent replicas (see :mod:`chainyard.diagnostics.rhat`
for what that means for an emcee ensemble).

Conventions: a constant input has no defined ESS and returns ``nan``
(``arviz-stats`` 0.8 returns the total number of draws instead; Stan and
the R package ``posterior`` return NA). Inputs with NaN/inf or fewer than
4 draws per chain raise ``ValueError``.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from ._acf import autocovariance
from ._validation import as_chains_draws, is_constant, rank_normalise, split_chains

FloatArray = npt.NDArray[np.float64]


def _geyer_ess(x: FloatArray) -> float:
    """Multi-chain ESS of (chains, draws) draws without splitting.

    Combines within-chain autocovariances with the between-chain variance
    (Vehtari et al. 2021, eqs. 10-11), truncates the autocorrelation sum with
    Geyer's initial positive sequence and enforces the initial monotone
    sequence (Geyer 1992, Statistical Science 7(4)). As in Stan, the
    estimate of tau is bounded below by ``1 / log10(S)`` so ESS <= S log10 S.

    Parameters
    ----------
    x : ndarray, shape (chains, draws)

    Returns
    -------
    float
        ESS, or ``nan`` when the pooled variance is zero.
    """
    n_chains, n_draws = x.shape
    acov = autocovariance(x)
    within = acov[:, 0].mean() * n_draws / (n_draws - 1.0)
    var_plus = within * (n_draws - 1.0) / n_draws
    if n_chains > 1:
        var_plus += np.var(x.mean(axis=1), ddof=1)
    if not var_plus > 0.0:
        return float("nan")
    rho = 1.0 - (within - acov.mean(axis=0)) / var_plus

    kept = np.zeros(n_draws)
    kept[0] = 1.0
    kept[1] = rho[1]
    even, odd = 1.0, rho[1]
    t = 1
    # Initial positive sequence: accept pairs (rho[t+1], rho[t+2]) while sums stay positive.
    while t < n_draws - 3 and even + odd > 0.0:
        even, odd = rho[t + 1], rho[t + 2]
        if even + odd >= 0.0:
            kept[t + 1] = even
            kept[t + 2] = odd
        t += 2
    last = t - 2  # index of the last odd lag inside the truncated sum
    if even > 0.0:
        kept[last + 1] = even  # Stan's variance-reducing extra term
    # Initial monotone sequence: pair sums must be non-increasing (running minimum).
    pair_sums = kept[: last + 1].reshape(-1, 2).sum(axis=1)
    pair_sums = np.minimum.accumulate(pair_sums)
    tau = -1.0 + 2.0 * pair_sums.sum() + kept[last + 1]
    total = n_chains * n_draws
    tau = max(tau, 1.0 / np.log10(total))
    return float(total / tau)


def ess_mean(x: npt.ArrayLike) -> float:
    """Split-chain ESS of the mean, without rank normalisation.

    Vehtari et al. (2021), Bayesian Analysis 16(2), Sec. 3.2 (split chains,
    eq. 10-11); this is the ESS relevant for the MCSE of the mean.

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
    return _geyer_ess(split_chains(arr))


def ess_bulk(x: npt.ArrayLike) -> float:
    """Bulk ESS: split-chain ESS of rank-normalised draws.

    Vehtari et al. (2021), Bayesian Analysis 16(2), Sec. 4.1.

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
    split = split_chains(arr)
    return _geyer_ess(rank_normalise(split))


def ess_quantile(x: npt.ArrayLike, q: float) -> float:
    """ESS of the ``q`` quantile: split-chain ESS of ``I(x <= quantile_q)``.

    Vehtari et al. (2021), Bayesian Analysis 16(2), Sec. 4.3. The quantile is
    the pooled linear-interpolation sample quantile (Hyndman & Fan type 7).

    Parameters
    ----------
    x : array_like, shape (chains, draws)
    q : float
        Probability in (0, 1).

    Returns
    -------
    float
    """
    if not 0.0 < q < 1.0:
        raise ValueError(f"q must lie strictly between 0 and 1; got {q}")
    arr = as_chains_draws(x)
    if is_constant(arr):
        return float("nan")
    indicator = (arr <= np.quantile(arr, q)).astype(float)
    return _geyer_ess(split_chains(indicator))


def ess_tail(x: npt.ArrayLike, prob: tuple[float, float] = (0.05, 0.95)) -> float:
    """Tail ESS: minimum of the quantile ESS at the 5% and 95% quantiles.

    Vehtari et al. (2021), Bayesian Analysis 16(2), Sec. 4.3.

    Parameters
    ----------
    x : array_like, shape (chains, draws)
    prob : (float, float)
        Lower and upper tail probabilities.

    Returns
    -------
    float
    """
    low, high = prob
    return min(ess_quantile(x, low), ess_quantile(x, high))


def ess_sd(x: npt.ArrayLike) -> float:
    """ESS for the standard deviation: split-chain ESS of ``(x - mean)^2``.

    Delta-method companion to :func:`ess_mean` used by :func:`mcse_sd`
    (Vehtari et al. 2021, Bayesian Analysis 16(2), Sec. 4.4).

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
    if is_constant(sq):
        return float("nan")
    return _geyer_ess(split_chains(sq))
