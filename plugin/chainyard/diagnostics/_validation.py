"""Input validation and small array transforms shared by the diagnostics.

All public diagnostics take one parameter at a time as an array of shape
``(chains, draws)``. The helpers here enforce that contract and raise
``ValueError`` with a clear message otherwise.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
from scipy import stats

FloatArray = npt.NDArray[np.float64]

#: Smallest number of draws per chain accepted by the split-chain diagnostics.
MIN_DRAWS = 4


def as_chains_draws(x: npt.ArrayLike, *, min_draws: int = MIN_DRAWS, name: str = "x") -> FloatArray:
    """Validate and return ``x`` as a float array of shape (chains, draws).

    Parameters
    ----------
    x : array_like, shape (chains, draws)
        Draws of one scalar parameter.
    min_draws : int
        Minimum number of draws per chain.
    name : str
        Name used in error messages.

    Returns
    -------
    ndarray, shape (chains, draws)

    Raises
    ------
    ValueError
        If ``x`` is not 2-D, has no chains, has fewer than ``min_draws`` draws,
        or contains NaN / infinite values.
    """
    arr = np.asarray(x, dtype=float)
    if arr.ndim != 2:
        raise ValueError(
            f"{name} must have shape (chains, draws) for one parameter; got shape {arr.shape}"
        )
    n_chains, n_draws = arr.shape
    if n_chains < 1:
        raise ValueError(f"{name} has no chains (shape {arr.shape})")
    if n_draws < min_draws:
        raise ValueError(f"{name} has {n_draws} draws per chain; at least {min_draws} are required")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} contains NaN or infinite values; remove or impute them first")
    return arr


def is_constant(x: FloatArray) -> bool:
    """Return True when every value of ``x`` is (numerically) identical."""
    return bool(np.ptp(x) <= np.finfo(float).resolution * max(1.0, float(np.max(np.abs(x)))))


def split_chains(x: FloatArray) -> FloatArray:
    """Split each chain into its first and last halves.

    Parameters
    ----------
    x : ndarray, shape (chains, draws)

    Returns
    -------
    ndarray, shape (2 * chains, draws // 2)
        For odd ``draws`` the middle draw is dropped (Vehtari et al. 2021, Sec. 4).
    """
    half = x.shape[1] // 2
    return np.concatenate((x[:, :half], x[:, x.shape[1] - half :]), axis=0)


def rank_normalise(x: FloatArray) -> FloatArray:
    """Rank-normalise all values jointly to standard-normal scores.

    Uses average ranks of the pooled draws and the Blom (1958) offset
    ``(r - 3/8) / (S + 1/4)`` before the inverse normal CDF, as in
    Vehtari et al. (2021), Bayesian Analysis 16(2), eq. 14.

    Parameters
    ----------
    x : ndarray, any shape

    Returns
    -------
    ndarray, same shape as ``x``
    """
    ranks = stats.rankdata(x, method="average", axis=None).reshape(x.shape)
    return stats.norm.ppf((ranks - 0.375) / (x.size + 0.25))


def fold(x: FloatArray) -> FloatArray:
    """Fold draws about their pooled median: ``|x - median(x)|``.

    Parameters
    ----------
    x : ndarray, any shape

    Returns
    -------
    ndarray, same shape as ``x``
    """
    return np.abs(x - np.median(x))
