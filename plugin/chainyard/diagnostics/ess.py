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

from collections.abc import Callable, Iterable, Iterator

import numpy as np
import numpy.typing as npt

from ._acf import autocovariance
from ._validation import as_chains_draws, is_constant, rank_normalise_inplace, split_chains

FloatArray = npt.NDArray[np.float64]


#: Input bytes per block of chains in the blockwise autocovariance (bounds FFT temporaries:
#: about nine times this, whatever the number of chains).
BLOCK_BYTES = 1 << 21


def rows_per_block(n_draws: int) -> int:
    """Chains per block so that one block holds about :data:`BLOCK_BYTES` of float64."""
    return max(1, BLOCK_BYTES // (8 * max(1, n_draws)))


def split_blocks(
    x: FloatArray, transform: Callable[[FloatArray], FloatArray] | None = None
) -> Iterator[FloatArray]:
    """Rows of ``split_chains(x)`` in blocks, without building the split array.

    Yields the first halves of all chains, then the second halves (the row order of
    :func:`~chainyard.diagnostics._validation.split_chains`; odd ``draws`` drop the middle
    draw), a few chains at a time, each block passed through ``transform`` if given (for
    example an indicator ``x <= q``).

    Parameters
    ----------
    x : ndarray, shape (chains, draws)
    transform : callable, optional
        Elementwise map applied to each block.

    Yields
    ------
    ndarray, shape (k, draws // 2)
    """
    n_chains, n_draws = x.shape
    half = n_draws // 2
    k = rows_per_block(half)
    for cols in (slice(0, half), slice(n_draws - half, n_draws)):
        for a in range(0, n_chains, k):
            block = x[a : a + k, cols]
            yield block if transform is None else transform(block)


def _geyer_ess_blocks(blocks: Iterable[FloatArray]) -> float:
    """Multi-chain ESS of chains given in blocks of rows (see :func:`_geyer_ess`).

    Autocovariances are computed one block at a time and summed over chains in chain
    order, so the result equals :func:`_geyer_ess` on the stacked rows, while memory is
    that of one block's FFT.
    """
    acov_sum: FloatArray | None = None
    acov0: list[float] = []
    means: list[float] = []
    n_draws = 0
    for block in blocks:
        acov = autocovariance(block)
        n_draws = block.shape[1]
        for row in acov:  # sequential, as acov.mean(axis=0) sums a C-ordered array
            if acov_sum is None:
                acov_sum = row.copy()
            else:
                acov_sum += row
        acov0.extend(acov[:, 0].tolist())
        means.extend(block.mean(axis=1).tolist())
        del acov
    if acov_sum is None:
        raise ValueError("no chains")
    n_chains = len(acov0)
    within = np.mean(acov0) * n_draws / (n_draws - 1.0)
    var_plus = within * (n_draws - 1.0) / n_draws
    if n_chains > 1:
        var_plus += np.var(means, ddof=1)
    if not var_plus > 0.0:
        return float("nan")
    acov_sum /= n_chains
    rho = 1.0 - (within - acov_sum) / var_plus
    del acov_sum

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


def _geyer_ess(x: FloatArray) -> float:
    """Multi-chain ESS of (chains, draws) draws without splitting.

    Combines within-chain autocovariances with the between-chain variance
    (Vehtari et al. 2021, eqs. 10-11), truncates the autocorrelation sum with
    Geyer's initial positive sequence and enforces the initial monotone
    sequence (Geyer 1992, Statistical Science 7(4)). As in Stan, the
    estimate of tau is bounded below by ``1 / log10(S)`` so ESS <= S log10 S.
    Chains are transformed a block at a time (:data:`BLOCK_BYTES`).

    Parameters
    ----------
    x : ndarray, shape (chains, draws)

    Returns
    -------
    float
        ESS, or ``nan`` when the pooled variance is zero.
    """
    k = rows_per_block(x.shape[1])
    return _geyer_ess_blocks(x[a : a + k] for a in range(0, x.shape[0], k))


def split_ess(x: FloatArray, transform: Callable[[FloatArray], FloatArray] | None = None) -> float:
    """Split-chain ESS of ``transform(x)`` without building the split or transformed array.

    Equals ``_geyer_ess(split_chains(transform(x)))`` for an elementwise ``transform``
    (Vehtari et al. 2021, Bayesian Analysis 16(2), Sec. 3.2); memory is one block of
    chains (:func:`split_blocks`).

    Parameters
    ----------
    x : ndarray, shape (chains, draws)
    transform : callable, optional

    Returns
    -------
    float
    """
    return _geyer_ess_blocks(split_blocks(x, transform))


def indicator(q_value: float) -> Callable[[FloatArray], FloatArray]:
    """The elementwise map ``x -> float(x <= q_value)`` of the quantile ESS."""

    def below(block: FloatArray) -> FloatArray:
        return (block <= q_value).astype(float)

    return below


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
    return split_ess(arr)


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
    return _geyer_ess(rank_normalise_inplace(split_chains(arr)))


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
    return split_ess(arr, indicator(float(np.quantile(arr, q))))


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
