"""Validation helpers for decision-policy inputs."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np
import numpy.typing as npt


def positive_int(value: int, name: str, minimum: int = 1) -> int:
    """Return ``value`` as int, or raise ValueError if not an integer >= minimum."""
    if isinstance(value, bool) or int(value) != value or value < minimum:
        raise ValueError(f"{name} must be an integer >= {minimum}; got {value!r}")
    return int(value)


def tau_values(tau_per_param: Mapping[str, float] | Sequence[float] | npt.ArrayLike) -> np.ndarray:
    """Return autocorrelation times as a finite, positive 1-D float array."""
    if isinstance(tau_per_param, Mapping):
        values = np.asarray(list(tau_per_param.values()), dtype=float)
    else:
        values = np.atleast_1d(np.asarray(tau_per_param, dtype=float))
    if values.size == 0:
        raise ValueError("tau_per_param is empty")
    if not np.all(np.isfinite(values)) or np.any(values <= 0):
        raise ValueError(f"autocorrelation times must be finite and positive; got {values}")
    return values


def tau_inputs(tau_per_param: Mapping[str, float] | Sequence[float] | npt.ArrayLike) -> object:
    """JSON-friendly copy of ``tau_per_param`` for a decision's ``inputs``."""
    if isinstance(tau_per_param, Mapping):
        return {str(k): float(v) for k, v in tau_per_param.items()}
    return [float(v) for v in np.atleast_1d(np.asarray(tau_per_param, dtype=float))]


def walker_mean_trace(trace: npt.ArrayLike, name: str = "trace") -> np.ndarray:
    """Return a finite 1-D trace; a (steps, walkers) input is averaged over walkers."""
    arr = np.asarray(trace, dtype=float)
    if arr.ndim == 2:
        arr = arr.mean(axis=1)
    if arr.ndim != 1:
        raise ValueError(f"{name} must have shape (steps,) or (steps, walkers); got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} contains NaN or infinite values")
    return arr


def ceil_int(x: float) -> int:
    """Ceiling as int, robust to tiny floating error (2.0000000001 -> 2)."""
    return math.ceil(round(x, 9))
