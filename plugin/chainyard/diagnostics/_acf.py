"""FFT-based autocovariance and autocorrelation along the draw axis."""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
from scipy import fft as sp_fft

FloatArray = npt.NDArray[np.float64]


def autocovariance(x: npt.ArrayLike) -> FloatArray:
    """Biased sample autocovariance of each row at every lag, via FFT.

    ``gamma[c, t] = (1/n) * sum_{s} (x[c, s] - xbar_c) (x[c, s + t] - xbar_c)``.
    The series is zero-padded to at least ``2 n`` so there is no circular
    wrap-around (standard Wiener-Khinchin estimate, e.g. Sokal 1997, Sec. 3).

    Parameters
    ----------
    x : array_like, shape (chains, draws)

    Returns
    -------
    ndarray, shape (chains, draws)
    """
    arr = np.atleast_2d(np.asarray(x, dtype=float))
    n = arr.shape[-1]
    centred = arr - arr.mean(axis=-1, keepdims=True)
    size = sp_fft.next_fast_len(2 * n, real=True)
    spec = sp_fft.rfft(centred, n=size, axis=-1)
    acov = sp_fft.irfft(spec * np.conjugate(spec), n=size, axis=-1)[..., :n]
    return acov / n


def autocorrelation(x: npt.ArrayLike) -> FloatArray:
    """Normalised autocorrelation of each row (``rho[c, 0] == 1``).

    Rows with zero variance yield NaN rows.

    Parameters
    ----------
    x : array_like, shape (chains, draws)

    Returns
    -------
    ndarray, shape (chains, draws)
    """
    acov = autocovariance(x)
    with np.errstate(invalid="ignore", divide="ignore"):
        return acov / acov[..., :1]
