"""Turn emcee ensemble replicas into (chains, draws) arrays for R-hat / ESS.

Input: ``replicas``, a sequence of arrays each of shape (steps, walkers) holding
one parameter of one independent replica (a separate ensemble run with its
own seed and initial ball). Replicas of unequal length are truncated to the
shortest one by keeping their *last* steps (the best-converged part).

Choice for R-hat: one chain per replica, made from the walker-mean trace
----------------------------------------------------------------------
R-hat (Vehtari et al. 2021, Bayesian Analysis 16(2)) assumes independent
chains. Across replicas that holds exactly; across walkers of one ensemble
it does not (each stretch move uses the other walkers, Goodman & Weare
2010), so walkers of a stuck ensemble agree with each other and would hide
the problem. The walker-mean trace of a replica is a stationary time series
whose long-run average is the posterior mean, and both its within-trace
variance and the between-replica variance of its average shrink by the same
ensemble factor, so R-hat on these traces is a valid test that independent
replicas agree on location (bulk R-hat) and on the spread of the
ensemble-mean process (folded R-hat).

Caveats: (1) the folded / tail part then concerns the distribution of the
walker mean, not the posterior tails; (2) a multimodal posterior whose
replicas each split their walkers between the modes in the same
proportions is not detected; (3) with one replica only split R-hat of the
trace is available, i.e. a within-run stationarity check; use >= 4
replicas for a meaningful between-run check. ``mode="walkers"`` (every walker
of every replica as a chain) is offered for pooled ESS / MCSE, where the
cross-walker correlation makes the ESS somewhat optimistic.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Literal

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]


def _common_tail(replicas: Sequence[npt.ArrayLike]) -> list[FloatArray]:
    if len(replicas) == 0:
        raise ValueError("need at least one replica")
    arrays = [np.asarray(r, dtype=float) for r in replicas]
    for i, arr in enumerate(arrays):
        if arr.ndim != 2:
            raise ValueError(
                f"replica {i} must have shape (steps, walkers) for one parameter; got {arr.shape}"
            )
        if not np.all(np.isfinite(arr)):
            raise ValueError(f"replica {i} contains NaN or infinite values")
    steps = min(arr.shape[0] for arr in arrays)
    if steps < 4:
        raise ValueError(f"shortest replica has {steps} steps; at least 4 are required")
    return [arr[arr.shape[0] - steps :] for arr in arrays]


def ensemble_to_chains(
    replicas: Sequence[npt.ArrayLike], mode: Literal["walker_mean", "walkers"] = "walker_mean"
) -> FloatArray:
    """Build a (chains, draws) array from ensemble replicas of one parameter.

    See the module docstring for why ``"walker_mean"`` is the default for
    R-hat (Vehtari et al. 2021, Bayesian Analysis 16(2); Goodman & Weare
    2010, CAMCoS 5(1)).

    Parameters
    ----------
    replicas : sequence of array_like, each shape (steps_r, walkers_r)
        One independent ensemble run per entry.
    mode : {"walker_mean", "walkers"}
        ``"walker_mean"``: one chain per replica, the mean over walkers at
        each step -> shape (n_replicas, steps). ``"walkers"``: every walker
        of every replica is a chain -> shape (sum of walkers, steps).

    Returns
    -------
    ndarray, shape (chains, steps)
        ``steps`` is the length of the shortest replica (last steps kept).
    """
    arrays = _common_tail(replicas)
    if mode == "walker_mean":
        return np.stack([arr.mean(axis=1) for arr in arrays])
    if mode == "walkers":
        return np.concatenate([arr.T for arr in arrays], axis=0)
    raise ValueError(f"mode must be 'walker_mean' or 'walkers'; got {mode!r}")


def walkers_as_chains(samples: npt.ArrayLike) -> FloatArray:
    """Transpose one replica's (steps, walkers) samples to (walkers, steps).

    This is the layout expected by :func:`integrated_time`, which averages
    the autocorrelation over walkers (Foreman-Mackey et al. 2013, PASP 125).

    Parameters
    ----------
    samples : array_like, shape (steps, walkers)

    Returns
    -------
    ndarray, shape (walkers, steps)
    """
    arr = np.asarray(samples, dtype=float)
    if arr.ndim != 2:
        raise ValueError(f"samples must have shape (steps, walkers); got {arr.shape}")
    return np.ascontiguousarray(arr.T)
