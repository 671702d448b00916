"""Thinning policies. The default is no thinning.

Cost-aware thinning (Owen 2017) lives in :mod:`.owen`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import numpy.typing as npt

from ._inputs import positive_int, tau_inputs, tau_values
from .records import ThinningDecision, fmt_int, keep_phrase

TauLike = Mapping[str, float] | Sequence[float] | npt.ArrayLike


def thin_none() -> ThinningDecision:
    """Keep every step (the default).

    Thinning discards information: for a fixed run, the thinned mean is never
    more precise than the full one, and thinning is rarely needed except for
    storage (Link & Eaton 2012, Methods Ecol. Evol. 3(1), 112-115).

    Returns
    -------
    ThinningDecision
    """
    return ThinningDecision(
        "none",
        {},
        1,
        "Kept every step: thinning discards information and is rarely needed for "
        "precision (Link & Eaton 2012).",
    )


def thin_fixed(k: int) -> ThinningDecision:
    """Keep every ``k``-th step (configuration choice; common practice, no source).

    Parameters
    ----------
    k : int
        Thinning factor >= 1.

    Returns
    -------
    ThinningDecision
    """
    factor = positive_int(k, "k")
    return ThinningDecision(
        "fixed",
        {"k": factor},
        factor,
        f"{keep_phrase(factor)}: fixed thinning requested by configuration.",
    )


def thin_from_tau(tau_per_param: TauLike, fraction: float = 0.5) -> ThinningDecision:
    """Keep every ``max(1, floor(fraction * min(tau)))``-th step.

    Using the *smallest* tau keeps consecutive retained draws correlated for
    every parameter, so little information is lost for any of them; the
    emcee documentation's example uses ``0.5 * min(tau)`` (from memory;
    common practice, no source).

    Parameters
    ----------
    tau_per_param : mapping or sequence of float
        Integrated autocorrelation times, in steps.
    fraction : float
        Fraction of the smallest tau (> 0).

    Returns
    -------
    ThinningDecision
    """
    taus = tau_values(tau_per_param)
    if not fraction > 0:
        raise ValueError(f"fraction must be positive; got {fraction}")
    tau_min = float(taus.min())
    factor = max(1, int(np.floor(fraction * tau_min)))
    return ThinningDecision(
        "tau",
        {
            "tau_per_param": tau_inputs(tau_per_param),
            "tau_min": tau_min,
            "fraction": float(fraction),
        },
        factor,
        f"{keep_phrase(factor)}: {fraction:g} x the smallest autocorrelation time ({tau_min:.1f}).",
    )


def thin_to_target(n_steps: int, walkers: int, target_draws: int) -> ThinningDecision:
    """Largest factor that still keeps at least ``target_draws`` draws in total.

    ``k = max(1, floor(n_steps * walkers / target_draws))``; keeping steps
    ``0, k, 2k, ...`` leaves ``walkers * ceil(n_steps / k) >= target_draws``
    draws (storage-driven; common practice, no source).

    Parameters
    ----------
    n_steps : int
        Steps per walker after burn-in.
    walkers : int
        Number of walkers (times replicas, if pooled).
    target_draws : int
        Desired total number of retained draws.

    Returns
    -------
    ThinningDecision
    """
    n = positive_int(n_steps, "n_steps")
    w = positive_int(walkers, "walkers")
    target = positive_int(target_draws, "target_draws")
    total = n * w
    factor = max(1, total // target)
    kept = w * -(-n // factor)
    if total < target:
        reason = (
            f"Kept every step: only {fmt_int(total)} draws are available, fewer than the "
            f"target {fmt_int(target)}."
        )
    else:
        reason = (
            f"{keep_phrase(factor)}: leaves {fmt_int(kept)} of {fmt_int(total)} "
            f"draws for a target of {fmt_int(target)}."
        )
    return ThinningDecision(
        "target",
        {"n_steps": n, "walkers": w, "target_draws": target, "kept_draws": kept},
        factor,
        reason,
    )
