"""Geweke (1992) stationarity z-scores at candidate burn-in cut points.

Geweke (1992), "Evaluating the accuracy of sampling-based approaches to the
calculation of posterior moments", in Bayesian Statistics 4, 169-193.
"""

from __future__ import annotations

import math
from typing import Literal

import numpy as np
import numpy.typing as npt

from ..diagnostics.ess import ess_mean
from ._inputs import walker_mean_trace
from .records import BurnInDecision, discard_sentence


def _long_run_variance(segment: np.ndarray) -> float:
    """Spectral density at zero, ``var * tau``, with tau from Geyer's monotone ESS."""
    if np.ptp(segment) == 0.0:
        return 0.0
    return float(np.var(segment, ddof=1) * segment.size / ess_mean(segment[None, :]))


def geweke_z(
    series: npt.ArrayLike,
    first: float = 0.1,
    last: float = 0.5,
    variance_from: Literal["last", "separate"] = "last",
) -> float:
    """Geweke z-score comparing the means of the first and last parts of a series.

    ``z = (mean_A - mean_B) / sqrt(S_A(0)/n_A + S_B(0)/n_B)`` with A the first
    ``first`` and B the last ``last`` fraction (Geweke 1992, Bayesian
    Statistics 4). The spectral densities at zero are estimated as
    ``var * tau`` with Geyer's initial monotone sequence instead of Geweke's
    spectral window. With ``variance_from="last"`` (default) both use
    ``S_B(0)``: under the null of stationarity the two segments share it, and
    estimating it from the later segment stops a transient from inflating
    its own variance and hiding itself (the same idea as Heidelberger & Welch
    1983, Oper. Res. 31(6)). ``"separate"`` is Geweke's original form.

    Parameters
    ----------
    series : array_like, shape (n,)
    first, last : float
        Fractions with ``first + last <= 1``.
    variance_from : {"last", "separate"}

    Returns
    -------
    float
        ``nan`` if both segments are constant and equal.
    """
    y = np.asarray(series, dtype=float)
    if not (0 < first < 1 and 0 < last < 1 and first + last <= 1):
        raise ValueError(f"need 0 < first, last and first + last <= 1; got {first}, {last}")
    if variance_from not in ("last", "separate"):
        raise ValueError(f"variance_from must be 'last' or 'separate'; got {variance_from!r}")
    n_a, n_b = int(first * y.size), int(last * y.size)
    if n_a < 4 or n_b < 4:
        need = 4 * math.ceil(1.0 / min(first, last))
        raise ValueError(
            f"Geweke's test needs segments of at least 4 steps (about {need} steps with "
            f"first={first:g}, last={last:g}); the series has {y.size} steps"
        )
    a, b = y[:n_a], y[y.size - n_b :]
    s_b = _long_run_variance(b)
    s_a = s_b if variance_from == "last" else _long_run_variance(a)
    var = s_a / n_a + s_b / n_b
    diff = float(a.mean() - b.mean())
    if var == 0.0:
        return float("nan") if diff == 0.0 else math.copysign(math.inf, diff)
    return diff / math.sqrt(var)


def burn_in_geweke(
    trace: npt.ArrayLike,
    n_candidates: int = 11,
    max_fraction: float = 0.5,
    z_crit: float = 1.96,
    label: str = "log-prob trace",
) -> BurnInDecision:
    """Smallest candidate cut after which the Geweke z-score is within ``z_crit``.

    Candidates are equally spaced from 0 to ``max_fraction`` of the run (as
    in coda's ``geweke.plot``); Geweke (1992), Bayesian Statistics 4. If no
    candidate passes, the largest is used and the reason says so.

    Parameters
    ----------
    trace : array_like, shape (steps,) or (steps, walkers)
        A (steps, walkers) input is averaged over walkers first.
    n_candidates : int
        Number of candidate cut points.
    max_fraction : float
        Largest cut, as a fraction of the steps.
    z_crit : float
        Two-sided threshold (1.96 for 5%).
    label : str
        Name of the trace used in the reason.

    Returns
    -------
    BurnInDecision
    """
    y = walker_mean_trace(trace)
    if n_candidates < 1:
        raise ValueError(f"n_candidates must be >= 1; got {n_candidates}")
    cuts = np.unique((np.linspace(0.0, max_fraction, n_candidates) * y.size).astype(int))
    zs = [geweke_z(y[c:]) for c in cuts]
    passing = [i for i, z in enumerate(zs) if abs(z) < z_crit]
    chosen = passing[0] if passing else len(cuts) - 1
    cut = int(cuts[chosen])
    if passing:
        why = f"first Geweke |z| < {z_crit:g} over {label} (z = {zs[chosen]:.2f})"
    else:
        why = (
            f"no candidate cut gave Geweke |z| < {z_crit:g} over {label}; "
            f"used the largest candidate (z = {zs[chosen]:.2f}), so run longer"
        )
    return BurnInDecision(
        policy="geweke",
        inputs={
            "candidates": [int(c) for c in cuts],
            "z_scores": [float(z) for z in zs],
            "z_crit": float(z_crit),
            "label": label,
            "steps": int(y.size),
            "passed": bool(passing),
        },
        steps_discarded=cut,
        reason=discard_sentence(cut, y.size, why),
    )
