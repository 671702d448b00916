"""Multivariate effective sample size by batch means.

Vats, Flegal and Jones (2019), "Multivariate output analysis for Markov chain
Monte Carlo", Biometrika 106(2), 321-337.
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt
from scipy import special  # not scipy.stats: 1 s of import for one function


def _batch_means_covariance(chains: npt.NDArray[np.float64], batch_size: int) -> np.ndarray:
    """Replicated batch-means estimate of the asymptotic covariance Sigma.

    Batch means of size ``b`` are formed within each chain and centred at
    the grand mean: ``Sigma = b / (C a - 1) * sum (Y_ck - Y)(Y_ck - Y)^T``,
    the single-chain estimator of Vats et al. (2019) eq. 6, pooled over
    chains (replicated batch means; Gupta & Vats 2020, arXiv:2007.04229).
    """
    n_chains, n_draws, n_params = chains.shape
    n_batches = n_draws // batch_size
    used = chains[:, n_draws - n_batches * batch_size :, :]
    means = used.reshape(n_chains, n_batches, batch_size, n_params).mean(axis=2)
    resid = (means - chains.reshape(-1, n_params).mean(axis=0)).reshape(-1, n_params)
    return batch_size * resid.T @ resid / (n_chains * n_batches - 1)


def multivariate_ess(x: npt.ArrayLike, batch_size: int | None = None) -> float:
    """Multivariate ESS ``n (det Lambda / det Sigma)^(1/p)``.

    Vats, Flegal & Jones (2019), Biometrika 106(2), eq. 2 / Sec. 3, with
    ``Lambda`` the sample covariance and ``Sigma`` the batch-means estimate
    (default batch size ``floor(sqrt(draws))``, mcmcse's "sqroot" choice).
    For several chains, batch means are taken within chains and pooled about
    the grand mean (conservative when chains disagree).

    Parameters
    ----------
    x : array_like, shape (draws, params) or (chains, draws, params)
    batch_size : int, optional
        Batch length ``b``; needs at least two batches in total.

    Returns
    -------
    float
        mESS, or ``nan`` if either covariance is singular.
    """
    arr = np.asarray(x, dtype=float)
    if arr.ndim == 2:
        arr = arr[None]
    if arr.ndim != 3:
        raise ValueError(
            f"x must have shape (draws, params) or (chains, draws, params); got {arr.shape}"
        )
    if not np.all(np.isfinite(arr)):
        raise ValueError("x contains NaN or infinite values")
    n_chains, n_draws, n_params = arr.shape
    if n_params < 1:
        raise ValueError("x has no parameters")
    b = math.isqrt(n_draws) if batch_size is None else int(batch_size)
    if b < 1 or n_chains * (n_draws // b) < 2:
        raise ValueError(
            f"need at least 2 batches: draws={n_draws}, chains={n_chains}, batch_size={b}"
        )
    if n_chains * n_draws <= n_params:
        raise ValueError(f"need more than {n_params} draws in total for {n_params} parameters")
    pooled = arr.reshape(-1, n_params)
    lam = np.atleast_2d(np.cov(pooled, rowvar=False))
    sigma = np.atleast_2d(_batch_means_covariance(arr, b))
    sign_l, logdet_l = np.linalg.slogdet(lam)
    sign_s, logdet_s = np.linalg.slogdet(sigma)
    if sign_l <= 0 or sign_s <= 0:
        return float("nan")
    return float(pooled.shape[0] * math.exp((logdet_l - logdet_s) / n_params))


def min_ess(p: int, alpha: float = 0.05, eps: float = 0.05) -> int:
    """Minimum ESS for relative precision ``eps`` at confidence ``1 - alpha``.

    ``minESS = 2^(2/p) pi / (p Gamma(p/2))^(2/p) * chi2_{1-alpha, p} / eps^2``,
    (Vats, Flegal & Jones 2019, Biometrika 106(2), Sec. 3.2). The bound is
    rounded *up*, the smallest integer satisfying it: for ``p = 1,
    alpha = eps = 0.05`` the bound is 6146.33, so this returns 6147. The R
    package mcmcse (``minESS``, dvats/mcmcse R/minESS.R) rounds to the
    nearest integer and reports 6146.

    Parameters
    ----------
    p : int
        Number of parameters (dimension of the estimated mean).
    alpha : float
        One minus the confidence level.
    eps : float
        Relative precision (volume of the confidence region relative to the
        posterior's generalised variance).

    Returns
    -------
    int
    """
    if int(p) != p or p < 1:
        raise ValueError(f"p must be a positive integer; got {p}")
    if not 0.0 < alpha < 1.0 or not eps > 0.0:
        raise ValueError(f"need 0 < alpha < 1 and eps > 0; got alpha={alpha}, eps={eps}")
    log_const = (2.0 / p) * (math.log(2.0) - math.log(p) - special.gammaln(p / 2.0))
    value = math.pi * math.exp(log_const) * _chi2_ppf(1.0 - alpha, p) / eps**2
    return math.ceil(value)


def _chi2_ppf(q: float, df: float) -> float:
    """The chi-square quantile function, as ``scipy.stats.chi2.ppf`` computes it (equal bit
    for bit: it is ``2 * gammaincinv(df / 2, q)`` there too)."""
    return float(2.0 * special.gammaincinv(df / 2.0, q))
