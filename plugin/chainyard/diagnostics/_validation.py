"""Input validation and small array transforms shared by the diagnostics.

All public diagnostics take one parameter at a time as an array of shape
``(chains, draws)``. The helpers here enforce that contract and raise
``ValueError`` with a clear message otherwise.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
from scipy import special

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.intp]

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
    """Return True when every value of ``x`` is (numerically) identical.

    Two reductions (min and max) and no temporary array: ``max |x|`` is
    ``max(|min x|, |max x|)``.
    """
    lo, hi = float(np.min(x)), float(np.max(x))
    return bool(hi - lo <= np.finfo(float).resolution * max(1.0, abs(lo), abs(hi)))


def split_chains(x: FloatArray) -> FloatArray:
    """Split each chain into its first and last halves.

    Parameters
    ----------
    x : ndarray, shape (chains, draws)

    Returns
    -------
    ndarray, shape (2 * chains, draws // 2)
        A new C-contiguous array. For odd ``draws`` the middle draw is dropped
        (Vehtari et al. 2021, Sec. 4).
    """
    n_chains, n_draws = x.shape
    half = n_draws // 2
    out = np.empty((2 * n_chains, half), dtype=float)
    out[:n_chains] = x[:, :half]
    out[n_chains:] = x[:, n_draws - half :]
    return out


#: Sorted values handled per block by :func:`average_ranks_sorted` (bounds its temporaries).
RANK_BLOCK = 1 << 17


def average_ranks_sorted(v: FloatArray) -> None:
    """Replace sorted values by their 1-based average ranks, in place.

    Tied values (equal neighbours of the sorted array) get the mean of the ordinal ranks
    they occupy, ``start + (count + 1) / 2``: the ``method="average"`` ranks of
    ``scipy.stats.rankdata``, bit for bit (all are integers or halves, exact in float64).
    Works block by block; a block ends where a run of ties ends, and a run longer than a
    block is filled on its own, so temporaries stay below a few :data:`RANK_BLOCK` elements
    whatever the ties (discrete parameters, stuck chains).

    Parameters
    ----------
    v : ndarray, shape (n,)
        Sorted ascending, C-contiguous; overwritten.
    """
    n = v.size
    pos = 0
    while pos < n:
        end = min(pos + RANK_BLOCK, n)
        if end < n and v[end] == v[end - 1]:  # do not cut a run of ties
            rest = v[pos:]
            lo = pos + int(np.searchsorted(rest, v[end - 1], side="left"))
            end = lo if lo > pos else pos + int(np.searchsorted(rest, v[end - 1], side="right"))
        seg = v[pos:end]
        m = seg.size
        if seg[0] == seg[-1]:  # one run (sorted): every element gets the same rank
            seg.fill(pos + (m + 1) / 2.0)
        else:
            new = np.empty(m, dtype=bool)
            new[0] = True
            np.not_equal(seg[1:], seg[:-1], out=new[1:])
            starts = np.flatnonzero(new)
            if starts.size == m:  # no ties in this block
                seg[:] = np.arange(pos + 1, pos + m + 1, dtype=float)
            else:
                counts = np.diff(starts, append=m)
                seg[:] = np.repeat((pos + 1) + starts + (counts - 1) / 2.0, counts)
        pos = end


def rank_normalise_flat(flat: FloatArray, work: FloatArray, n_used: int | None = None) -> None:
    """Rank-normalise a flat array in place, with one argsort and one work buffer.

    Same values as :func:`rank_normalise` (Vehtari et al. 2021, Bayesian Analysis 16(2),
    eq. 14: average ranks, Blom offset, inverse normal CDF). Memory: the index array of the
    argsort (``flat.size`` integers) while it runs, and ``work``; nothing else of that size.

    Parameters
    ----------
    flat : ndarray, shape (N,)
        Finite values, C-contiguous; overwritten with the normal scores.
    work : ndarray, shape (N,)
        Scratch buffer (overwritten).
    n_used : int, optional
        Rank only the ``n_used`` smallest values, the others being ``+inf`` placeholders
        that are left alone (default: all). Lets a caller leave draws out of the ranking
        (the middle draw of odd-length chains in split diagnostics) without a copy.
    """
    n = flat.size if n_used is None else int(n_used)
    order = np.argsort(flat)
    np.take(flat, order, out=work, mode="clip")  # sorted values; "clip": no buffered copy
    v = work[:n]
    average_ranks_sorted(v)
    v -= 0.375
    v /= n + 0.25
    special.ndtri(v, out=v)  # scipy.stats.norm.ppf is ndtri for 0 < p < 1
    flat[order[:n]] = v
    del order


def rank_normalise_inplace(x: FloatArray, work: FloatArray | None = None) -> FloatArray:
    """:func:`rank_normalise` overwriting ``x`` (C-contiguous float64); returns ``x``.

    Parameters
    ----------
    x : ndarray, any shape, C-contiguous
    work : ndarray, shape (x.size,), optional
        Scratch buffer to reuse (default: a new one).

    Returns
    -------
    ndarray
        ``x``, now holding the normal scores.
    """
    if not x.flags.c_contiguous:
        raise ValueError("rank_normalise_inplace needs a C-contiguous array")
    flat = x.reshape(-1)
    rank_normalise_flat(flat, np.empty_like(flat) if work is None else work[: flat.size])
    return x


def rank_normalise(x: FloatArray) -> FloatArray:
    """Rank-normalise all values jointly to standard-normal scores.

    Uses average ranks of the pooled draws and the Blom (1958) offset
    ``(r - 3/8) / (S + 1/4)`` before the inverse normal CDF, as in
    Vehtari et al. (2021), Bayesian Analysis 16(2), eq. 14. Ties get average ranks
    exactly as ``scipy.stats.rankdata(method="average")``.

    Parameters
    ----------
    x : ndarray, any shape

    Returns
    -------
    ndarray, same shape as ``x``
    """
    return rank_normalise_inplace(np.array(x, dtype=float, order="C", copy=True))


def fold(x: FloatArray) -> FloatArray:
    """Fold draws about their pooled median: ``|x - median(x)|``.

    Parameters
    ----------
    x : ndarray, any shape

    Returns
    -------
    ndarray, same shape as ``x``
    """
    out = x - np.median(x)
    return np.abs(out, out=out)
