"""The numbers behind the pairs figure, with NumPy only: smoothed histograms, the thresholds
of highest-density regions, and a correlation with its Monte Carlo standard error.

Smoothing is a Gaussian kernel of sd ``SMOOTH_BINS`` bins, applied along every axis of a
histogram; a region holding a share of the draws is the smallest set of bins holding it.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import numpy.typing as npt

from chainyard.diagnostics import mcse_mean

__all__ = ["BINS", "LEVELS", "SMOOTH_BINS", "correlation_with_mcse", "region_thresholds"]

#: credible levels of the 2-D regions (shares of the draws inside)
LEVELS = (0.5, 0.9)
#: histogram bins per axis before smoothing, and the kernel's sd in bins
BINS = 64
SMOOTH_BINS = 1.6


def _kernel(sigma: float) -> npt.NDArray[np.float64]:
    half = max(1, int(np.ceil(3 * sigma)))
    t = np.arange(-half, half + 1, dtype=np.float64)
    k = np.exp(-0.5 * (t / sigma) ** 2)
    return k / k.sum()


def _smooth(h: npt.NDArray[np.float64], sigma: float = SMOOTH_BINS) -> npt.NDArray[np.float64]:
    """``h`` (1-D or 2-D) convolved with a Gaussian of sd ``sigma`` bins along every axis."""
    k = _kernel(sigma)
    out = np.asarray(h, dtype=np.float64)
    for axis in range(out.ndim):
        out = np.apply_along_axis(lambda v: np.convolve(v, k, mode="same"), axis, out)
    return out


def region_thresholds(density: npt.NDArray[np.float64], levels: Sequence[float]) -> list[float]:
    """Density values whose upper sets hold ``levels`` of the total (increasing order).

    The bins are sorted by density (highest first); the threshold for level ``p`` is the
    density of the bin where the running total first reaches ``p`` of the whole.
    """
    flat = np.sort(density.ravel())[::-1]
    total = np.cumsum(flat)
    if total[-1] <= 0:
        return []
    out = []
    for p in sorted(levels, reverse=True):  # wider region first: lower threshold
        i = int(np.searchsorted(total, p * total[-1]))
        out.append(float(flat[min(i, flat.size - 1)]))
    return sorted(set(out))


def correlation_with_mcse(x: npt.ArrayLike, y: npt.ArrayLike) -> tuple[float, float]:
    """Pearson correlation of two parameters and its Monte Carlo standard error.

    Parameters
    ----------
    x, y : array_like, shape (chains, draws)
        The two parameters' draws (every walker or chain of every replica as a chain).

    Returns
    -------
    (float, float)
        ``r`` and its MCSE: ``r`` is the mean of the product of the standardised draws,
        whose MCSE is :func:`chainyard.diagnostics.mcse_mean` of that product (the
        delta-method error of the standardisation is left out; it is of smaller order).
        ``nan`` for a constant parameter.
    """
    a, b = np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
    sa, sb = a.std(), b.std()
    if not (sa > 0 and sb > 0):
        return float("nan"), float("nan")
    prod = ((a - a.mean()) / sa) * ((b - b.mean()) / sb)
    return float(prod.mean()), float(mcse_mean(prod))
