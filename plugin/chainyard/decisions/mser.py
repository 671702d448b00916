"""MSER truncation rule for the initial transient (burn-in).

White (1997), "An effective truncation heuristic for bias reduction in
simulation output", Simulation 69(6), 323-334; batched MSER-5 variant from
White, Cobb and Spratt (2000), "A comparison of five steady-state
truncation heuristics for simulation", Proc. Winter Simulation Conf.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from ._inputs import positive_int, walker_mean_trace
from .records import BurnInDecision, discard_sentence, fmt_int


def mser_statistic(series: npt.ArrayLike) -> np.ndarray:
    """MSER(d) for every truncation point ``d`` of a 1-D series.

    ``MSER(d) = sum_{i >= d} (y_i - ybar_d)^2 / (n - d)^2`` with ``ybar_d`` the
    mean of the retained values (White 1997, Simulation 69(6), eq. 1).

    Parameters
    ----------
    series : array_like, shape (n,)

    Returns
    -------
    ndarray, shape (n,)
        ``MSER(d)`` for ``d = 0 .. n - 1`` (the last value is 0 by construction).
    """
    y = np.asarray(series, dtype=float)
    y = y - y.mean()  # improves the conditioning of the sum-of-squares identity
    kept = np.arange(y.size, 0, -1, dtype=float)  # n - d
    s1 = np.cumsum(y[::-1])[::-1]
    s2 = np.cumsum((y * y)[::-1])[::-1]
    sse = np.maximum(s2 - s1 * s1 / kept, 0.0)
    return sse / kept**2


def burn_in_mser(
    trace: npt.ArrayLike,
    batch_size: int = 5,
    max_fraction: float = 0.5,
    label: str = "log-prob trace",
) -> BurnInDecision:
    """MSER-``b`` truncation point of a walker-mean or log-prob trace.

    The trace is cut into non-overlapping batches of ``batch_size`` steps
    (MSER-5 for ``b = 5``; White, Cobb & Spratt 2000), MSER is computed on
    the batch means (White 1997, Simulation 69(6)) and the cut minimising it
    over the first ``max_fraction`` of the batches is chosen. A minimum at
    that limit means the transient may not have ended (White et al. 2000
    treat it as "run too short"); the reason then says so.

    Parameters
    ----------
    trace : array_like, shape (steps,) or (steps, walkers)
        A (steps, walkers) input is averaged over walkers first.
    batch_size : int
        Batch length ``b``; steps left over after the last full batch are ignored.
    max_fraction : float
        Largest fraction of the run that may be discarded.
    label : str
        Name of the trace used in the reason, e.g. ``"walker-mean trace of 'm'"``.

    Returns
    -------
    BurnInDecision
    """
    y = walker_mean_trace(trace)
    b = positive_int(batch_size, "batch_size")
    if not 0.0 < max_fraction <= 1.0:
        raise ValueError(f"max_fraction must be in (0, 1]; got {max_fraction}")
    n_batches = y.size // b
    if n_batches < 4:
        raise ValueError(
            f"MSER-{b} needs at least 4 batches ({4 * b} steps); the trace has {y.size} steps"
        )
    means = y[: n_batches * b].reshape(n_batches, b).mean(axis=1)
    stat = mser_statistic(means)
    last = max(1, int(max_fraction * n_batches))
    best = int(np.argmin(stat[: last + 1]))
    at_limit = best == last and last < n_batches - 1
    cut = best * b
    why = f"MSER-{b} minimum over {label}"
    if at_limit:
        why += (
            f" (minimum at the {max_fraction:.0%} limit of {fmt_int(y.size)} steps; "
            "the transient may not have ended, so run longer)"
        )
    return BurnInDecision(
        policy="mser",
        inputs={
            "batch_size": b,
            "max_fraction": float(max_fraction),
            "label": label,
            "steps": int(y.size),
            "mser_min": float(stat[best]),
            "at_limit": bool(at_limit),
        },
        steps_discarded=cut,
        reason=discard_sentence(cut, y.size, why),
    )
