"""Acceptance-rate diagnostics for an emcee ensemble.

Stuck-walker rule (chosen here, documented): walker ``w`` with acceptance
fraction ``f_w`` is flagged when it is both *relatively* low,
``f_w < stuck_ratio * median(f)`` (default ``stuck_ratio = 0.5``), and
*statistically* low, ``median(f) - f_w > z * sqrt(m (1 - m) / steps)`` with
``m = median(f)`` and ``z = 3``, i.e. more than three binomial standard errors
below the ensemble median. The second condition prevents false alarms on
short runs, the first on very long ones. If no proposal was accepted at
all, every walker is flagged.

The 0.2-0.5 target band for the mean acceptance of the stretch move is
common practice (no formal source); from memory, Foreman-Mackey et al. (2013, PASP 125)
give the same rule of thumb citing Gelman, Roberts & Gilks (1996).
"""

from __future__ import annotations

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


def acceptance_report(
    accepted: npt.ArrayLike,
    band: tuple[float, float] = (0.2, 0.5),
    stuck_ratio: float = 0.5,
    z: float = 3.0,
) -> AcceptanceReport:
    """Summarise acceptance of a (steps, walkers) boolean array.

    Band 0.2-0.5 for the stretch move: common practice, no source. Stuck
    rule: see the module docstring.

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
        messages.append(
            f"Mean acceptance {mean:.3f} is outside the target band {band[0]:g}-{band[1]:g}."
        )
    if stuck.size:
        shown = ", ".join(str(i) for i in stuck[:10]) + (" ..." if stuck.size > 10 else "")
        messages.append(
            f"{stuck.size} of {frac.size} walkers look stuck (acceptance far below the "
            f"median {median:.3f}): {shown}."
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
