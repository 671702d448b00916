"""Burn-in policies: fixed, fraction, multiple of tau, and the default rule.

MSER and Geweke data-driven rules live in :mod:`.mser` and :mod:`.geweke`.
All policies take ``steps`` (per walker) and return a :class:`BurnInDecision`;
none may discard every step (``ValueError``).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import numpy.typing as npt

from ._inputs import ceil_int, positive_int, tau_inputs, tau_values, walker_mean_trace
from .mser import burn_in_mser
from .records import BurnInDecision, discard_sentence, fmt_int

TauLike = Mapping[str, float] | Sequence[float] | npt.ArrayLike


def _check_cut(cut: int, steps: int, what: str) -> None:
    if cut >= steps:
        raise ValueError(
            f"{what} would discard {fmt_int(cut)} of {fmt_int(steps)} steps, leaving nothing"
        )


def burn_in_fixed(n_steps: int, steps: int) -> BurnInDecision:
    """Discard a fixed number of initial steps (common practice, no source).

    Parameters
    ----------
    n_steps : int
        Steps to discard (>= 0).
    steps : int
        Total steps per walker.

    Returns
    -------
    BurnInDecision
    """
    n = positive_int(n_steps, "n_steps", minimum=0)
    total = positive_int(steps, "steps")
    _check_cut(n, total, "burn_in_fixed")
    return BurnInDecision(
        "fixed",
        {"n_steps": n, "steps": total},
        n,
        discard_sentence(n, total, "fixed burn-in requested by configuration"),
    )


def burn_in_fraction(frac: float, steps: int) -> BurnInDecision:
    """Discard the first ``floor(frac * steps)`` steps (common practice, no source).

    Parameters
    ----------
    frac : float
        Fraction in [0, 1).
    steps : int
        Total steps per walker.

    Returns
    -------
    BurnInDecision
    """
    if not 0.0 <= frac < 1.0:
        raise ValueError(f"frac must be in [0, 1); got {frac}")
    total = positive_int(steps, "steps")
    n = int(np.floor(frac * total))
    return BurnInDecision(
        "fraction",
        {"frac": float(frac), "steps": total},
        n,
        discard_sentence(n, total, f"fixed fraction {frac:.0%} of the run"),
    )


def burn_in_from_tau(tau_per_param: TauLike, multiple: float, steps: int) -> BurnInDecision:
    """Discard ``ceil(multiple * max(tau))`` steps.

    A few autocorrelation times let the ensemble forget its initial ball;
    the emcee documentation's example uses ``2 * max(tau)`` (from memory;
    the exact multiple is common practice, no source).

    Parameters
    ----------
    tau_per_param : mapping or sequence of float
        Integrated autocorrelation time of each parameter, in steps.
    multiple : float
        Multiple of the largest tau (> 0).
    steps : int
        Total steps per walker.

    Returns
    -------
    BurnInDecision
    """
    taus = tau_values(tau_per_param)
    if not multiple > 0:
        raise ValueError(f"multiple must be positive; got {multiple}")
    total = positive_int(steps, "steps")
    tau_max = float(taus.max())
    n = ceil_int(multiple * tau_max)
    _check_cut(n, total, "burn_in_from_tau")
    return BurnInDecision(
        "tau",
        {
            "tau_per_param": tau_inputs(tau_per_param),
            "tau_max": tau_max,
            "multiple": float(multiple),
            "steps": total,
        },
        n,
        discard_sentence(n, total, f"{multiple:g} x max autocorrelation time ({tau_max:.1f})"),
    )


def default_burn_in(
    log_prob: npt.ArrayLike,
    tau_per_param: TauLike | None = None,
    *,
    multiple: float = 2.0,
    batch_size: int = 5,
    max_fraction: float = 0.5,
) -> BurnInDecision:
    """Default rule: the larger of the MSER-5 cut and ``2 x max(tau)``, capped at half.

    Why: MSER-5 on the walker-mean log-prob trace (White 1997, Simulation
    69(6); White, Cobb & Spratt 2000) removes a *visible* transient - the
    log-prob is the most sensitive scalar summary of the ensemble moving from
    its initial ball into the typical set, and it needs no tau. But MSER can
    return 0 when the transient is small against the noise, so a floor of a
    few autocorrelation times (``2 x max tau``, as in the emcee documentation's
    example, from memory; common practice) gives the walkers time to forget
    their start. Both are cheap, deterministic and recorded. The cut is
    capped at ``max_fraction`` of the run; hitting the cap, or an MSER
    minimum at its limit, is stated in the reason because it means the run
    is too short.

    Parameters
    ----------
    log_prob : array_like, shape (steps,) or (steps, walkers)
        Log-probability trace (averaged over walkers if 2-D).
    tau_per_param : mapping or sequence of float, optional
        Autocorrelation times; if omitted only MSER is used.
    multiple : float
        Multiple of the largest tau.
    batch_size : int
        MSER batch length.
    max_fraction : float
        Largest fraction of the run that may be discarded.

    Returns
    -------
    BurnInDecision
    """
    trace = walker_mean_trace(log_prob, "log_prob")
    steps = int(trace.size)
    mser = burn_in_mser(trace, batch_size=batch_size, max_fraction=max_fraction)
    tau_cut = 0
    tau_max: float | None = None
    if tau_per_param is not None:
        tau_max = float(tau_values(tau_per_param).max())
        tau_cut = ceil_int(multiple * tau_max)
    cap = int(max_fraction * steps)
    cut = min(max(mser.steps_discarded, tau_cut), cap)
    if tau_max is None:
        why = f"MSER-{batch_size} minimum over the log-prob trace"
    else:
        why = (
            f"larger of MSER-{batch_size} cut on the log-prob trace "
            f"({fmt_int(mser.steps_discarded)}) and {multiple:g} x max tau ({fmt_int(tau_cut)})"
        )
    warnings = []
    if max(mser.steps_discarded, tau_cut) > cap:
        warnings.append(f"capped at {max_fraction:.0%} of the run")
    if mser.inputs["at_limit"]:
        warnings.append("MSER minimum at its limit")
    if warnings:
        why += f" ({'; '.join(warnings)}: the run is probably too short)"
    return BurnInDecision(
        "default",
        {
            "mser_cut": mser.steps_discarded,
            "tau_cut": tau_cut,
            "tau_max": tau_max,
            "multiple": float(multiple),
            "batch_size": int(batch_size),
            "max_fraction": float(max_fraction),
            "steps": steps,
            "tau_per_param": None if tau_per_param is None else tau_inputs(tau_per_param),
        },
        cut,
        discard_sentence(cut, steps, why),
    )


def combine_burn_in(decisions: Sequence[BurnInDecision], steps: int) -> BurnInDecision:
    """Take the largest cut of several decisions (e.g. MSER per parameter).

    Parameters
    ----------
    decisions : sequence of BurnInDecision
    steps : int
        Total steps per walker.

    Returns
    -------
    BurnInDecision
    """
    if not decisions:
        raise ValueError("no decisions to combine")
    total = positive_int(steps, "steps")
    worst = max(decisions, key=lambda d: d.steps_discarded)
    n = int(worst.steps_discarded)
    _check_cut(n, total, "combine_burn_in")
    return BurnInDecision(
        "max",
        {"components": [d.to_dict() for d in decisions], "steps": total},
        n,
        discard_sentence(n, total, f"largest of {len(decisions)} policies ({worst.policy})"),
    )


def burn_in_after_adaptation(
    decision: BurnInDecision, adapt_steps: int, steps: int
) -> BurnInDecision:
    """Raise a burn-in cut to at least the sampler's adaptation window.

    Steps taken while a Metropolis-Hastings proposal is still being tuned are not draws from
    one fixed transition kernel, so the usual MCMC guarantees do not cover them; they are
    always discarded, whatever the policy found (Roberts and Rosenthal 2009, "Examples of
    adaptive MCMC", J. Comput. Graph. Stat. 18(2): adaptation must stop, or diminish, for
    the chain to target the posterior; a fixed window then discarded is the simple case).

    Parameters
    ----------
    decision : BurnInDecision
        The policy's decision.
    adapt_steps : int
        Steps of the adaptation phase (from step 0 of the stores decided on).
    steps : int
        Total steps per chain.

    Returns
    -------
    BurnInDecision
        ``decision`` unchanged when it already discards ``adapt_steps`` or more; otherwise
        the same policy with ``steps_discarded = adapt_steps``, the policy's own cut kept in
        ``inputs["policy_cut"]`` and a reason that says why.

    Raises
    ------
    ValueError
        If the adaptation window holds every step (nothing would be left).
    """
    adapt = positive_int(adapt_steps, "adapt_steps", minimum=0)
    total = positive_int(steps, "steps")
    _check_cut(adapt, total, "the adaptation window (sampler.adapt_steps)")
    if decision.steps_discarded >= adapt:
        if adapt == 0:
            return decision
        inputs = {**decision.inputs, "adapt_steps": adapt}
        reason = decision.reason.rstrip(".") + (
            f" (this also covers the {fmt_int(adapt)} adaptation steps, which are always "
            "discarded)."
        )
        return BurnInDecision(decision.policy, inputs, decision.steps_discarded, reason)
    inputs = {**decision.inputs, "adapt_steps": adapt, "policy_cut": decision.steps_discarded}
    reason = discard_sentence(
        adapt,
        total,
        f"the Metropolis-Hastings adaptation window (sampler.adapt_steps = {fmt_int(adapt)}) "
        "is always discarded, since its draws do not come from one fixed kernel; the "
        f"{decision.policy} policy alone would discard {fmt_int(decision.steps_discarded)}",
    )
    return BurnInDecision(decision.policy, inputs, adapt, reason)
