"""Nested R-hat with replicas as superchains and the walkers of a replica as its chains.

Margossian, Hoffman, Sountsov, Riou-Durand, Vehtari and Gelman (2024), "Nested R-hat:
assessing the convergence of Markov chain Monte Carlo when running many short chains",
Bayesian Analysis (doi:10.1214/24-BA1453), eqs. 4-8. With ``K`` superchains of ``M`` chains
of ``N`` draws, chain means ``m_{mk}``, superchain means ``m_k`` and overall mean ``m``::

    B_nu = 1/(K-1) sum_k (m_k - m)^2                       (between superchains)
    W_nu = 1/K sum_k (Btilde_k + Wtilde_k)                 (within superchains)
    Btilde_k = 1/(M-1) sum_m (m_{mk} - m_k)^2              (0 if M = 1)
    Wtilde_k = 1/M sum_m 1/(N-1) sum_n (x_{nmk} - m_{mk})^2 (0 if N = 1)
    nested R-hat = sqrt(1 + B_nu / W_nu)

As in the rank-normalised R-hat of Vehtari et al. (2021), each chain is split in halves (the
halves keep their superchain) and the statistic is the larger of the bulk version (normal
scores of the pooled ranks) and the folded version (normal scores of ``|x - median|``);
this is ``arviz_stats.rhat_nested(method="rank")``.

What the statistic compares for an ensemble
-------------------------------------------
In the paper the chains of one superchain share a starting point and are independent given
it. The walkers of one replica start at different points and every move of a walker uses
the others, so they are dependent. The statistic is still interpretable, because only the
*replicas* need to be independent (they are: separate seeds and separate starts):

* ``B_nu`` is the sample variance of the ``K`` replica means (each the mean over all walkers
  and steps of that replica). For independent replicas its expectation is
  ``Var(replica mean) + spread of the replica biases``, whatever the dependence between
  walkers: with a stationary start the first term is ``sigma^2 / ESS_r`` with ``ESS_r`` the
  true effective sample size of one replica (cross-walker correlation included); a replica
  that has not forgotten its start, or that holds a different share of the modes, adds its
  squared offset.
* ``W_nu`` is the average within-replica variance split as "between walker means" plus
  "within walkers"; their sum is the variance of all draws of a replica (up to the
  ``(N-1)/N``, ``(M-1)/M`` factors), which estimates the posterior variance ``sigma^2``
  whatever the walker dependence (dependence only moves variance between the two terms).

So ``nested R-hat^2 - 1 ~ 1/ESS_r + (replica offsets / sigma)^2``: it compares how far the
replica means are apart with the posterior standard deviation. Unlike R-hat on one
walker-mean trace per replica (within variance ``~ sigma^2 / M``), the scale is the
posterior sd, so on a healthy run it is ``M`` times closer to 1: a stationary run needs only
``ESS_r`` of order 100 (``1.01^2 - 1 = 0.0201``; with 4 replicas the 99th percentile of
``B_nu`` is ~3.8 times its mean (chi-square, 3 degrees of freedom), so ``ESS_r > ~190``
passes 99% of the time), which 32 walkers reach after a few tau. A threshold of 1.01 thus
flags replica means that differ by more than about ``0.14`` posterior sd (for 4 replicas).

Threshold: the paper uses ``nested R-hat < 1 + delta`` and studies ``delta = 0.01``
(from memory; the paper relates ``delta`` to the required precision of the superchain
means); chainyard's default ``max_nested_rhat = 1.01`` follows it. Simulations (emcee stretch
move, 4 replicas x 32 walkers, 4-D standard normal started at the target, tau ~48 steps;
measured in this project): the largest nested R-hat over parameters was at most 1.0011 at 40,
80 and 160 steps per tau (23 runs), i.e. far from 1.01, as the derivation predicts; replicas
holding different shares of two modes give values far above it. What nested R-hat cannot see
is a bias shared by all replicas: on centred eight schools (all replicas under-visit the
funnel's neck alike) it stayed at 1.0006-1.0087 from 1,000 to 64,000 steps while the classic
walker-mean R-hat was 1.04-1.35; that run is caught by the tau checks
(:mod:`chainyard.decisions.targets`).

Replicas with different numbers of walkers cannot form equal superchains; :func:`diagnose`
then reports no nested R-hat (and the mixing check fails as "missing").
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from ._validation import MIN_DRAWS, as_chains_draws, is_constant, rank_normalise_flat
from .ess import rows_per_block

FloatArray = npt.NDArray[np.float64]

__all__ = ["nested_rhat", "nested_rhat_of_scores", "nested_rhat_of_split"]


def _half_stats(x: FloatArray, half: int) -> tuple[FloatArray, FloatArray]:
    """Means and variances (ddof 1) of the first and last ``half`` draws of each row.

    Streams over blocks of rows (a few MiB), so no temporary the size of ``x``.

    Returns
    -------
    means, variances : ndarray, shape (2, chains)
        Row 0 the first halves, row 1 the last halves.
    """
    n_chains, n_draws = x.shape
    means = np.empty((2, n_chains))
    variances = np.empty((2, n_chains))
    k = rows_per_block(n_draws)
    for a in range(0, n_chains, k):
        b = min(n_chains, a + k)
        for i, part in enumerate((x[a:b, :half], x[a:b, n_draws - half :])):
            means[i, a:b] = part.mean(axis=1)
            variances[i, a:b] = part.var(axis=1, ddof=1) if half > 1 else 0.0
    return means, variances


def nested_rhat_of_split(means: FloatArray, variances: FloatArray, groups: int) -> float:
    """Nested R-hat (eqs. 4-8) from chain means and variances, chains grouped in order.

    Parameters
    ----------
    means, variances : ndarray, shape (chains,)
        Mean and variance (ddof 1) of each chain; chains ``[k*M, (k+1)*M)`` form superchain
        ``k``.
    groups : int
        Number of superchains ``K`` (>= 2); ``chains`` must be a multiple of it.

    Returns
    -------
    float
    """
    n = means.size
    if groups < 2 or n % groups:
        raise ValueError(f"{n} chains cannot form {groups} equal superchains (need >= 2)")
    m = means.reshape(groups, -1)
    super_means = m.mean(axis=1)
    between_chains = m.var(axis=1, ddof=1) if m.shape[1] > 1 else np.zeros(groups)
    within = variances.reshape(groups, -1).mean(axis=1)
    b_nu = np.var(super_means, ddof=1)
    w_nu = np.mean(between_chains + within)
    if w_nu <= 0.0:
        return float("inf") if b_nu > 0.0 else float("nan")
    return float(np.sqrt(1.0 + b_nu / w_nu))


def nested_rhat_of_scores(scores: FloatArray, replicas: int) -> float:
    """Nested R-hat of split chains given as normal scores laid out like the draws.

    ``scores[c]`` is chain ``c`` (replica ``c // (chains / replicas)``); its first and last
    ``draws // 2`` values are the two split halves (for odd ``draws`` the middle value is
    not used). The halves stay in their chain's superchain.

    Parameters
    ----------
    scores : ndarray, shape (chains, draws)
    replicas : int
        With one replica the first and last halves of the run are the two superchains:
        a drift check only (it cannot see a mode the replica never visited).

    Returns
    -------
    float
    """
    n_chains, n_draws = scores.shape
    half = n_draws // 2
    means, variances = _half_stats(scores, half)
    if replicas == 1:  # the run's two halves act as the superchains (a drift check)
        return nested_rhat_of_split(means.reshape(-1), variances.reshape(-1), 2)
    per = n_chains // replicas
    # order halves by superchain: replica k owns its chains' first and last halves
    m = means.reshape(2, replicas, per).transpose(1, 0, 2).reshape(-1)
    v = variances.reshape(2, replicas, per).transpose(1, 0, 2).reshape(-1)
    return nested_rhat_of_split(m, v, replicas)


def _fold_split_inplace(x: FloatArray, work: FloatArray) -> None:
    """``x <- |x - median|`` with the median over the split halves (middle draw left out)."""
    n_chains, n_draws = x.shape
    half = n_draws // 2
    used = n_chains * 2 * half
    w = work[:used].reshape(n_chains, 2 * half)
    w[:, :half] = x[:, :half]
    w[:, half:] = x[:, n_draws - half :]
    med = float(np.median(w.reshape(-1), overwrite_input=True))
    x -= med
    np.abs(x, out=x)


def _rank_split_inplace(x: FloatArray, work: FloatArray) -> None:
    """Normal scores of the split halves' pooled ranks, in place (middle draw -> +inf)."""
    n_chains, n_draws = x.shape
    used = x.size
    if n_draws % 2:
        x[:, n_draws // 2] = np.inf
        used -= n_chains
    rank_normalise_flat(x.reshape(-1), work[: x.size], used)


def nested_rhat_folded_inplace(x: FloatArray, work: FloatArray, replicas: int) -> float:
    """Folded nested R-hat of raw draws ``x`` (C-contiguous, overwritten), bounded memory."""
    _fold_split_inplace(x, work)
    _rank_split_inplace(x, work)
    return nested_rhat_of_scores(x, replicas)


def nested_rhat(x: npt.ArrayLike, replicas: int) -> float:
    """Rank-normalised split nested R-hat, ``max(bulk, folded)``, of one parameter.

    Margossian et al. (2024), Bayesian Analysis, eqs. 4-8, with the rank normalisation and
    folding of Vehtari et al. (2021); equals ``arviz_stats.rhat_nested(method="rank")``.

    Parameters
    ----------
    x : array_like, shape (chains, draws)
        Chains ``[k*M, (k+1)*M)`` are the ``M`` walkers of replica ``k``.
    replicas : int
        Number of replicas (superchains), dividing ``chains``; with 1 the halves of the run
        are the superchains (see :func:`nested_rhat_of_scores`).

    Returns
    -------
    float
        ``nan`` for constant input.
    """
    arr = as_chains_draws(x, min_draws=MIN_DRAWS)
    if replicas < 1 or arr.shape[0] % replicas:
        raise ValueError(f"{arr.shape[0]} chains cannot form {replicas} equal replicas")
    if is_constant(arr):
        return float("nan")
    work = np.empty(arr.size)
    bulk = np.array(arr, dtype=float, order="C", copy=True)
    _rank_split_inplace(bulk, work)
    r_bulk = nested_rhat_of_scores(bulk, replicas)
    folded = np.array(arr, dtype=float, order="C", copy=True)
    r_folded = nested_rhat_folded_inplace(folded, work, replicas)
    return float(max(r_bulk, r_folded))
