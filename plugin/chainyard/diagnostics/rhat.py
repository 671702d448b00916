"""Rank-normalised split R-hat for one parameter, shape (chains, draws).

Vehtari, Gelman, Simpson, Carpenter and Buerkner (2021), "Rank-normalization,
folding, and localization: an improved R-hat for assessing convergence of
MCMC", Bayesian Analysis 16(2), 667-718.

What "chains" means
-------------------
R-hat compares between-chain and within-chain variance and is only
meaningful when the chains are *independent*: separate runs started from
dispersed initial points with different seeds (replicas). The walkers of
one emcee ensemble are not independent chains: every stretch move of a
walker uses the positions of the others, so the walkers of one ensemble
drift together and can agree with each other while the whole ensemble is
still far from the target. Feeding the walkers of a single ensemble to
:func:`rhat` therefore gives an over-optimistic answer. Use
:func:`chainyard.diagnostics.ensemble_to_chains` to build (chains, draws)
arrays from several replicas.

Conventions (match ``arviz-stats``): a constant input gives ``nan``; chains
that are each constant but at different values give ``inf``. With a single
chain the split halves are compared (allowed, unlike ``arviz-stats``, which
returns ``nan``). NaN/inf input or fewer than 4 draws raise ``ValueError``.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from ._validation import as_chains_draws, fold, is_constant, rank_normalise_inplace, split_chains

FloatArray = npt.NDArray[np.float64]


def _basic_rhat(x: FloatArray) -> float:
    """Gelman-Rubin potential scale reduction of (chains, draws), no splitting.

    ``sqrt(((n - 1)/n W + B/n) / W)`` (Vehtari et al. 2021, eqs. 1-4).

    Parameters
    ----------
    x : ndarray, shape (chains, draws)

    Returns
    -------
    float
    """
    n_draws = x.shape[1]
    if np.all(np.ptp(x, axis=1) == 0.0):  # no within-chain variance at all
        return float("nan") if np.ptp(x) == 0.0 else float("inf")
    between = n_draws * np.var(x.mean(axis=1), ddof=1)
    within = np.mean(np.var(x, axis=1, ddof=1))
    return float(np.sqrt((between / within + n_draws - 1.0) / n_draws))


def rhat_bulk(x: npt.ArrayLike) -> float:
    """Bulk R-hat: split R-hat of rank-normalised draws.

    Vehtari et al. (2021), Bayesian Analysis 16(2), Sec. 4.1 (eq. 14).

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
    return _basic_rhat(rank_normalise_inplace(split_chains(arr)))


def rhat_folded(x: npt.ArrayLike) -> float:
    """Folded R-hat: split R-hat of rank-normalised ``|x - median(x)|``.

    Sensitive to differences in scale between chains; Vehtari et al. (2021),
    Bayesian Analysis 16(2), Sec. 4.2.

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
    return _basic_rhat(rank_normalise_inplace(fold(split_chains(arr))))


def rhat(x: npt.ArrayLike) -> float:
    """Rank-normalised split R-hat: ``max(rhat_bulk, rhat_folded)``.

    Vehtari et al. (2021), Bayesian Analysis 16(2), Sec. 4.2, recommended
    for use with the threshold 1.01.

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
    folded = fold(split)
    work = np.empty(split.size)
    bulk = _basic_rhat(rank_normalise_inplace(split, work))
    del split
    folded_rhat = _basic_rhat(rank_normalise_inplace(folded, work))
    return float(max(bulk, folded_rhat))
