"""Thin wrappers applying a one-parameter diagnostic over a trailing parameter axis.

Each parameter is processed separately (one (chains, draws) slice at a time),
so peak memory is that of one parameter (about three copies of it) plus the input.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import numpy.typing as npt

from .ess import ess_bulk, ess_tail
from .rhat import rhat

FloatArray = npt.NDArray[np.float64]


def per_param(
    func: Callable[..., float], x: npt.ArrayLike, *args: object, **kwargs: object
) -> FloatArray:
    """Apply ``func`` to every ``x[..., j]``.

    Parameters
    ----------
    func : callable
        A diagnostic taking a (chains, draws) array and returning a float,
        e.g. :func:`rhat` or :func:`integrated_time`.
    x : array_like, shape (chains, draws, params)
    *args, **kwargs
        Passed through to ``func``.

    Returns
    -------
    ndarray, shape (params,)
    """
    arr = np.asarray(x)
    if arr.ndim != 3:
        raise ValueError(f"x must have shape (chains, draws, params); got {arr.shape}")
    return np.array([func(arr[..., j], *args, **kwargs) for j in range(arr.shape[-1])])


def rhat_per_param(x: npt.ArrayLike) -> FloatArray:
    """:func:`rhat` for each parameter of (chains, draws, params) -> (params,)."""
    return per_param(rhat, x)


def ess_bulk_per_param(x: npt.ArrayLike) -> FloatArray:
    """:func:`ess_bulk` for each parameter of (chains, draws, params) -> (params,)."""
    return per_param(ess_bulk, x)


def ess_tail_per_param(x: npt.ArrayLike) -> FloatArray:
    """:func:`ess_tail` for each parameter of (chains, draws, params) -> (params,)."""
    return per_param(ess_tail, x)
