"""Every per-parameter summary of pooled chains in one pass, in bounded memory.

:func:`pooled_summary` returns, for one parameter given as (chains, draws), the values of
``mean``, ``sd`` (ddof 1), the 5/50/95% quantiles, :func:`~chainyard.diagnostics.ess_bulk`,
:func:`~chainyard.diagnostics.ess_tail`, :func:`~chainyard.diagnostics.mcse_mean` and
:func:`~chainyard.diagnostics.mcse_quantile` at 5% and 95% (Vehtari, Gelman, Simpson,
Carpenter and Buerkner 2021, Bayesian Analysis 16(2), 667-718), equal to calling those
functions one by one, while holding at most three arrays the size of the input:

* the input itself (overwritten with its rank-normalised scores at the end);
* one work buffer (``work``), reused by every step: the squared deviations for ``sd``, the
  partitioned copy for the quantiles and the MCSE order statistics, the sorted values for
  the ranks;
* the index array of the one argsort of the rank normalisation, while it lives.

Everything else is streamed over blocks of a few chains (about 2 MiB each): the split-chain
autocovariances of the ESS (one FFT per block, never the whole (chains, draws) array), the
quantile indicators ``x <= q`` (built per block, never as a full array), the ranks of tied
values (per run of ties). The steps are separate functions, called in order by
:func:`pooled_summary`, so that their cost can be measured one by one.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import numpy.typing as npt

from ._validation import MIN_DRAWS, is_constant, rank_normalise_flat
from .ess import indicator, split_ess
from .mcse import quantile_interval_ranks

FloatArray = npt.NDArray[np.float64]

__all__ = [
    "moments",
    "pooled_summary",
    "quantiles",
    "rank_normalise_split",
    "tail_order_statistics",
]

#: Probabilities of the reported quantiles and of the tail ESS / quantile MCSE.
QUANTILES = (0.05, 0.5, 0.95)
TAILS = (0.05, 0.95)


def moments(flat: FloatArray, work: FloatArray) -> tuple[float, float]:
    """Pooled mean and standard deviation (ddof 1), using ``work`` for the deviations.

    Same operations as ``flat.mean()`` and ``flat.std(ddof=1)`` (numpy's pairwise sums over
    the whole array), so the same values, without numpy's temporary copy.

    Parameters
    ----------
    flat : ndarray, shape (N,)
    work : ndarray, shape (N,)
        Overwritten.

    Returns
    -------
    (float, float)
    """
    mean = flat.mean()
    np.subtract(flat, mean, out=work)
    np.square(work, out=work)
    var = work.sum() / (flat.size - 1)
    return float(mean), float(np.sqrt(var))


def quantiles(flat: FloatArray, work: FloatArray) -> tuple[float, float, float]:
    """``np.quantile(flat, QUANTILES)``, partitioning ``work`` (a copy of ``flat``) in place.

    Parameters
    ----------
    flat : ndarray, shape (N,)
    work : ndarray, shape (N,)
        Overwritten with a partitioned copy of ``flat`` (used again by
        :func:`tail_order_statistics`).

    Returns
    -------
    (float, float, float)
    """
    np.copyto(work, flat)
    q = np.quantile(work, QUANTILES, overwrite_input=True)
    return float(q[0]), float(q[1]), float(q[2])


def tail_order_statistics(work: FloatArray, indices: list[int]) -> dict[int, float]:
    """Order statistics of a permutation of the pooled draws, by in-place partition.

    Parameters
    ----------
    work : ndarray, shape (N,)
        Any permutation of the pooled draws; reordered in place.
    indices : list of int
        0-based ranks wanted.

    Returns
    -------
    dict
        ``{rank: value}``.
    """
    kth = sorted(set(indices))
    if kth:
        work.partition(kth)
    return {k: float(work[k]) for k in kth}


def rank_normalise_split(x: FloatArray, work: FloatArray) -> FloatArray:
    """Rank-normalise the split chains of ``x`` in place (Vehtari et al. 2021, eq. 14).

    The ranks are those of ``split_chains(x)`` (odd ``draws``: the middle draw of each
    chain is left out of the ranking, set to ``+inf`` and never used again), so that
    ``split_ess(x)`` afterwards equals ``ess_bulk`` of the original draws.

    Parameters
    ----------
    x : ndarray, shape (chains, draws), C-contiguous
        Overwritten with the normal scores.
    work : ndarray, shape (x.size,)
        Scratch buffer.

    Returns
    -------
    ndarray
        ``x``.
    """
    n_chains, n_draws = x.shape
    used = x.size
    if n_draws % 2:
        x[:, n_draws // 2] = np.inf  # sorts last, outside the first `used` ranks
        used -= n_chains
    rank_normalise_flat(x.reshape(-1), work, used)
    return x


def _squared_deviation(mean: float) -> Any:
    def sq(block: FloatArray) -> FloatArray:
        out = block - mean
        return np.square(out, out=out)

    return sq


def _refuse_non_finite(flat: FloatArray) -> None:
    """Raise ``ValueError`` if ``flat`` holds NaN or infinite values (no full-size temporary)."""
    if math.isfinite(float(flat.sum())):
        return
    step = 1 << 18
    for a in range(0, flat.size, step):
        if not np.isfinite(flat[a : a + step]).all():
            raise ValueError("x contains NaN or infinite values; remove or impute them first")


def pooled_summary(
    x: FloatArray, work: FloatArray | None = None, *, overwrite: bool = False
) -> dict[str, Any]:
    """Mean, sd, quantiles, bulk/tail ESS and mean/quantile MCSE of pooled chains.

    Values equal :func:`~chainyard.diagnostics.ess_bulk`, ``ess_tail``, ``mcse_mean`` and
    ``mcse_quantile`` on ``x`` (Vehtari et al. 2021, Bayesian Analysis 16(2), Secs. 3-4);
    see the module docstring for the memory used (at most three arrays of ``x``'s size).

    Parameters
    ----------
    x : ndarray, shape (chains, draws)
        Finite float64 draws of one parameter, every chain a chain for ESS / MCSE.
    work : ndarray, shape (x.size,), optional
        Scratch buffer to reuse across parameters (default: a new one).
    overwrite : bool
        If True, ``x`` must be C-contiguous float64 and is overwritten (it holds the
        rank-normalised split draws on return); otherwise a copy is made first.

    Returns
    -------
    dict
        ``mean``, ``sd``, ``q05``, ``q50``, ``q95``, ``ess_bulk``, ``ess_tail``,
        ``ess_q05``, ``ess_q95``, ``ess_mean``, ``ess_sd``, ``mcse_mean``, ``mcse_sd``,
        ``mcse_q05``, ``mcse_q95`` (floats; ESS / MCSE are ``nan`` for constant draws).

    Raises
    ------
    ValueError
        If ``x`` is not (chains, >= 4 draws) or holds NaN or infinite values (like the
        single-value functions).
    """
    if not overwrite or not (x.flags.c_contiguous and x.dtype == np.float64):
        x = np.array(x, dtype=float, order="C", copy=True)
    if x.ndim != 2 or x.shape[1] < MIN_DRAWS:
        raise ValueError(f"x must have shape (chains, >= {MIN_DRAWS} draws); got {x.shape}")
    flat = x.reshape(-1)
    if work is None:
        work = np.empty_like(flat)
    work = work[: flat.size]
    _refuse_non_finite(flat)
    mean, sd = moments(flat, work)
    # work holds the squared deviations: the moments of the delta-method MCSE of sd
    m2 = float(work.sum() / flat.size)
    m4 = float(np.dot(work, work) / flat.size)
    q05, q50, q95 = quantiles(flat, work)
    out: dict[str, Any] = {"mean": mean, "sd": sd, "q05": q05, "q50": q50, "q95": q95}
    nan = float("nan")
    if is_constant(x):
        keys = ("ess_bulk", "ess_tail", "ess_q05", "ess_q95", "ess_mean", "ess_sd")
        out.update(dict.fromkeys(keys, nan))
        out.update(mcse_mean=nan, mcse_sd=nan, mcse_q05=nan, mcse_q95=nan)
        return out
    # MCSE of sd (delta method, as mcse_sd): ESS of the squared deviations, streamed
    ess_sd = split_ess(x, _squared_deviation(mean))
    out["ess_sd"] = ess_sd
    var_of_var = (m4 - m2 * m2) / ess_sd if ess_sd > 0 else nan
    out["mcse_sd"] = float(math.sqrt(var_of_var / m2 / 4.0)) if var_of_var >= 0 else nan
    # ESS of the mean and of the tail indicators, streamed over blocks of split chains.
    # (np.quantile's value at one probability does not depend on the others asked for.)
    ess_q = {q: split_ess(x, indicator(v)) for q, v in zip(TAILS, (q05, q95), strict=True)}
    out["ess_q05"], out["ess_q95"] = ess_q[TAILS[0]], ess_q[TAILS[1]]
    out["ess_tail"] = min(ess_q.values())
    ess_mean = split_ess(x)
    out["ess_mean"] = ess_mean
    out["mcse_mean"] = sd / math.sqrt(ess_mean)
    # Quantile MCSE: two order statistics per tail, from the partitioned copy in `work`.
    ranks = {
        q: quantile_interval_ranks(e, q, flat.size) for q, e in ess_q.items() if np.isfinite(e)
    }
    stats = tail_order_statistics(work, [k for pair in ranks.values() for k in pair])
    for q, key in zip(TAILS, ("mcse_q05", "mcse_q95"), strict=True):
        lo_hi = ranks.get(q)
        out[key] = nan if lo_hi is None else float((stats[lo_hi[1]] - stats[lo_hi[0]]) / 2.0)
    # Bulk ESS last: it overwrites x with the normal scores of the split chains.
    out["ess_bulk"] = split_ess(rank_normalise_split(x, work))
    return out
