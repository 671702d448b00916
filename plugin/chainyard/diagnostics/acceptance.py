"""Acceptance-rate diagnostics: walkers of an ensemble, chains, and accept-reject sampling.

Independent Metropolis-Hastings chains are judged like Gaussian random-walk moves (the same
band; the stuck rule flags single chains). Accept-reject runs report the rate of accepted
proposals with its binomial standard error (:func:`accept_reject_rate`).

Stuck-walker rule (chosen here, documented): walker ``w`` with acceptance
fraction ``f_w`` is flagged when it is both *relatively* low,
``f_w < stuck_ratio * median(f)`` (default ``stuck_ratio = 0.5``), and
*statistically* low, ``median(f) - f_w > z * sqrt(m (1 - m) / steps)`` with
``m = median(f)`` and ``z = 3``, i.e. more than three binomial standard errors
below the ensemble median. The second condition prevents false alarms on
short runs, the first on very long ones. If no proposal was accepted at
all, every walker is flagged.

Mean-acceptance warnings only where they carry information (:func:`acceptance_band`):

* Gaussian random-walk moves: the efficient range is known. The optimal acceptance is
  0.234 as the dimension grows (Roberts, Gelman and Gilks 1997, Ann. Appl. Probab. 7(1))
  and about 0.44 in one dimension (Roberts and Rosenthal 2001, Statistical Science 16(4),
  which also report the efficiency staying high roughly between 0.15 and 0.5; from memory).
  Band 0.15-0.5, widened to 0.15-0.6 below 5 parameters. A rate near 1 means a far too small
  step (the chain barely moves), near 0 a far too large one.
* Ensemble moves (stretch, walk, differential evolution, snooker): no published optimum.
  The 0.2-0.5 rule of thumb quoted for emcee (Foreman-Mackey et al. 2013, from memory)
  fires on every healthy low-dimensional run, where the stretch move accepts about 0.5-0.75
  (measured in this project). Only a mean below 0.05 is flagged ("the ensemble barely moves":
  common practice, no source).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from ._jsonable import to_builtin


@dataclass(frozen=True)
class AcceptanceReport:
    """Per-walker and ensemble acceptance summary.

    Attributes
    ----------
    per_walker : tuple of float, length walkers
        Acceptance fraction of each walker.
    mean, median : float
        Ensemble mean and median of ``per_walker``.
    steps : int
        Number of steps the fractions are computed over.
    stuck_walkers : tuple of int
        Indices of walkers flagged by the stuck rule (module docstring).
    band : (float, float)
        Target band for the mean.
    in_band : bool
        Whether ``band[0] <= mean <= band[1]``.
    messages : tuple of str
        Human-readable lines (empty when all is well).
    """

    per_walker: tuple[float, ...]
    mean: float
    median: float
    steps: int
    stuck_walkers: tuple[int, ...]
    band: tuple[float, float]
    in_band: bool
    messages: tuple[str, ...]

    @property
    def ok(self) -> bool:
        """True when the mean is in band and no walker is stuck."""
        return self.in_band and not self.stuck_walkers

    def to_dict(self) -> dict[str, object]:
        """Return a JSON-serialisable dict (numpy types converted)."""
        return {
            "per_walker": to_builtin(self.per_walker),
            "mean": self.mean,
            "median": self.median,
            "steps": self.steps,
            "stuck_walkers": to_builtin(self.stuck_walkers),
            "band": to_builtin(self.band),
            "in_band": self.in_band,
            "ok": self.ok,
            "messages": list(self.messages),
        }


#: Lowest mean acceptance of an ensemble move before a warning (common practice, no source).
ENSEMBLE_FLOOR = 0.05


def acceptance_band(move_kinds: Sequence[str] | None, n_params: int) -> tuple[float, float]:
    """Mean-acceptance band that carries information for these moves (module docstring).

    Parameters
    ----------
    move_kinds : sequence of str or None
        The run's move kinds (``"stretch"``, ``"gaussian"``, ...); ``None`` if unknown
        (treated as ensemble moves).
    n_params : int
        Dimension of the target.

    Returns
    -------
    (float, float)
    """
    if move_kinds and all(k in ("gaussian", "metropolis_hastings") for k in move_kinds):
        return (0.15, 0.5) if n_params >= 5 else (0.15, 0.6)
    return (ENSEMBLE_FLOOR, 1.0)


def acceptance_report(
    accepted: npt.ArrayLike,
    band: tuple[float, float] = (ENSEMBLE_FLOOR, 1.0),
    stuck_ratio: float = 0.5,
    z: float = 3.0,
) -> AcceptanceReport:
    """Summarise acceptance of a (steps, walkers) boolean array.

    Default band: the ensemble-move floor (:func:`acceptance_band`; common practice, no
    source). Stuck rule: see the module docstring.

    Parameters
    ----------
    accepted : array_like of bool, shape (steps, walkers)
        ``accepted[t, w]`` is True when walker ``w`` moved at step ``t``.
    band : (float, float)
        Acceptable range of the ensemble-mean acceptance fraction.
    stuck_ratio : float
        Relative threshold of the stuck rule.
    z : float
        Binomial-standard-error threshold of the stuck rule.

    Returns
    -------
    AcceptanceReport
    """
    arr = np.asarray(accepted)
    if arr.ndim != 2:
        raise ValueError(f"accepted must have shape (steps, walkers); got {arr.shape}")
    if arr.shape[0] < 1 or arr.shape[1] < 1:
        raise ValueError(f"accepted is empty (shape {arr.shape})")
    if arr.dtype != bool:
        if not np.all(np.isin(arr, (0, 1))):
            raise ValueError("accepted must be boolean (or 0/1) per step and walker")
        arr = arr.astype(bool)
    steps = int(arr.shape[0])
    frac = arr.mean(axis=0)
    mean = float(frac.mean())
    median = float(np.median(frac))
    if mean == 0.0:
        stuck = np.arange(frac.size)
    else:
        se = np.sqrt(median * (1.0 - median) / steps)
        stuck = np.flatnonzero((frac < stuck_ratio * median) & (median - frac > z * se))
    in_band = bool(band[0] <= mean <= band[1])

    messages: list[str] = []
    if not in_band:
        if mean < band[0]:
            hint = "the walkers barely move (proposals too large, or a hard target)"
        else:
            hint = "proposals too small: the walkers move in tiny steps"
        messages.append(f"Mean acceptance {mean:.3f} is outside {band[0]:g}-{band[1]:g}: {hint}.")
    if stuck.size:
        shown = ", ".join(str(i) for i in stuck[:10]) + (" ..." if stuck.size > 10 else "")
        messages.append(
            f"{stuck.size} of {frac.size} walkers or chains have acceptance far below the "
            f"median {median:.3f}: {shown} (the verdict says whether they are stuck, in a "
            "minority region, or slow chains)."
        )
    return AcceptanceReport(
        per_walker=tuple(float(f) for f in frac),
        mean=mean,
        median=median,
        steps=steps,
        stuck_walkers=tuple(int(i) for i in stuck),
        band=(float(band[0]), float(band[1])),
        in_band=in_band,
        messages=tuple(messages),
    )


def accept_reject_rate(
    proposals: npt.ArrayLike, log_bound: float | None = None
) -> dict[str, object]:
    """Acceptance rate of an accept-reject run, per chain and overall, with binomial SEs.

    The rate is accepted draws / proposals, ``p = n / N``; its standard error is the binomial
    ``sqrt(p (1 - p) / N)`` (common practice, no source; N itself is random, which this
    approximation ignores). For a normalised target the rate estimates ``1 / M`` (Robert and
    Casella 2004, section 2.3).

    Parameters
    ----------
    proposals : array_like, shape (steps, chains)
        Proposals each stored draw took (the accepted one included).
    log_bound : float, optional
        The run's log M; adds ``one_over_m`` for comparison.
    """
    arr = np.asarray(proposals, dtype=np.float64)
    if arr.ndim != 2 or arr.size == 0:
        raise ValueError(f"proposals must have shape (steps, chains); got {arr.shape}")
    return rate_from_counts(arr.shape[0], arr.sum(axis=0), log_bound)


def rate_from_counts(
    draws: int, proposals: npt.ArrayLike, log_bound: float | None = None
) -> dict[str, object]:
    """:func:`accept_reject_rate` from totals: ``draws`` per chain, ``proposals`` per chain
    (shape (chains,))."""
    per_chain = np.asarray(proposals, dtype=np.float64)
    total = float(per_chain.sum())
    n = draws * per_chain.size
    rate = n / total
    rates = draws / per_chain
    out: dict[str, object] = {
        "draws": int(n),
        "proposals": int(total),
        "rate": float(rate),
        "se": float(np.sqrt(rate * (1.0 - rate) / total)),
        "per_chain": to_builtin(rates),
        "per_chain_se": to_builtin(np.sqrt(rates * (1.0 - rates) / per_chain)),
        "proposals_per_draw": float(total / n),
    }
    if log_bound is not None and -log_bound < 700:  # beyond: no float (an unnormalised f)
        out["one_over_m"] = float(np.exp(-log_bound))
    return out
