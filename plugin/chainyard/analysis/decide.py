"""Burn-in and thinning decisions for a run's replicas, from the run config's policy."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from chainyard.config import (
    BurnInSpec,
    CostAwareThinning,
    DefaultBurnIn,
    FixedBurnIn,
    FixedThinning,
    FractionBurnIn,
    GewekeBurnIn,
    MserBurnIn,
    NoThinning,
    TargetThinning,
    TauBurnIn,
    TauThinning,
    ThinningSpec,
)
from chainyard.decisions import (
    BurnInDecision,
    ThinningDecision,
    burn_in_after_adaptation,
    burn_in_fixed,
    burn_in_fraction,
    burn_in_from_tau,
    burn_in_geweke,
    burn_in_mser,
    default_burn_in,
    thin_cost_aware,
    thin_fixed,
    thin_from_tau,
    thin_none,
    thin_to_target,
)
from chainyard.decisions.records import discard_sentence
from chainyard.diagnostics import autocorrelation, integrated_time
from chainyard.errors import StoreError
from chainyard.store import Store

__all__ = [
    "adaptation_steps",
    "decide_burn_in",
    "decide_thinning",
    "tau_per_param",
    "tau_per_replica",
]


def tau_per_replica(stores: Sequence[Store], steps: int) -> list[dict[str, float]]:
    """Each replica's own integrated autocorrelation time per parameter (in steps).

    One parameter column of one replica is read at a time; walkers are averaged as in
    Foreman-Mackey et al. (2013) (see :func:`chainyard.diagnostics.integrated_time`).
    """
    return [
        {
            name: float(integrated_time(s.column(j, 0, steps).T))
            for j, name in enumerate(s.param_names)
        }
        for s in stores
    ]


def tau_per_param(stores: Sequence[Store], steps: int) -> dict[str, float]:
    """Largest integrated autocorrelation time over replicas, per parameter (in steps)."""
    per_replica = tau_per_replica(stores, steps)
    return {name: max(t[name] for t in per_replica) for name in per_replica[0]}


def _walker_mean_log_prob(store: Store, steps: int) -> NDArray[np.float64]:
    return np.asarray(store.log_prob(0, steps).mean(axis=1))


def _combine(decisions: list[BurnInDecision], steps: int) -> BurnInDecision:
    """The largest cut over replicas, keeping the deciding replica's reason."""
    if len(decisions) == 1:
        return decisions[0]
    worst = max(range(len(decisions)), key=lambda i: decisions[i].steps_discarded)
    d = decisions[worst]
    reason = d.reason.rstrip(".") + f" (largest cut of {len(decisions)} replicas: replica "
    reason += f"{worst})."
    return BurnInDecision(
        d.policy,
        {
            "per_replica": [x.to_dict() for x in decisions],
            "deciding_replica": worst,
            "steps": steps,
        },
        d.steps_discarded,
        reason,
    )


def _too_short(what: str, steps: int, error: ValueError) -> StoreError:
    """One-line error for a store too short for the policy's method (names the minimum)."""
    return StoreError(f"cannot decide {what} on {steps} steps: {error}")


def adaptation_steps(stores: Sequence[Store]) -> int:
    """Rows of the stores still inside the sampler's adaptation window (0 for none).

    Metropolis-Hastings with ``sampler.adapt_steps`` tunes its proposal during the first
    ``adapt_steps`` sampled steps; for derived stores the rows already dropped count.
    """
    from chainyard.analysis.selection import row_map

    attrs = getattr(stores[0], "attrs", None) or {}  # arrays in memory carry no config
    sampler = (attrs.get("config") or {}).get("sampler") or {}
    if sampler.get("kind") != "metropolis_hastings":
        return 0
    adapt = int(sampler.get("adapt_steps") or 0)
    offset, stride = row_map(attrs)
    return max(0, -(-(adapt - offset) // stride))


def decide_burn_in(stores: Sequence[Store], spec: BurnInSpec) -> BurnInDecision:
    """The burn-in cut (steps to discard from every replica) under ``spec``.

    Data-driven policies are applied to each replica's walker-mean log-prob trace; the largest
    cut over replicas is taken so that every replica keeps the same steps. A
    Metropolis-Hastings adaptation window is always discarded (the cut is at least
    ``sampler.adapt_steps``; :func:`chainyard.decisions.burn_in_after_adaptation`).

    Raises
    ------
    StoreError
        If the stores are too short for the policy's method (the message names the minimum,
        e.g. "MSER-5 needs at least 4 batches (20 steps)").
    """
    steps = min(s.steps_done for s in stores)
    try:
        if _exact_draws(stores) and not isinstance(spec, FixedBurnIn):
            return _no_burn_in(spec, steps)
        decision = _decide_burn_in(stores, spec, steps)
        return burn_in_after_adaptation(decision, adaptation_steps(stores), steps)
    except ValueError as e:
        raise _too_short("burn-in", steps, e) from None


def _exact_draws(stores: Sequence[Store]) -> bool:
    """Whether the stores hold accept-reject draws (exact, independent draws of the target)."""
    from chainyard.analysis.diagnose import sampler_kind

    return sampler_kind(stores) == "accept_reject"


def _no_burn_in(spec: BurnInSpec, steps: int) -> BurnInDecision:
    """Burn-in 0 for accept-reject draws: every draw is an exact, independent draw of the
    target (Robert and Casella 2004, section 2.3), so there is no start to forget."""
    return BurnInDecision(
        "none (accept-reject)",
        {"sampler_kind": "accept_reject", "configured_policy": spec.policy, "steps": steps},
        0,
        discard_sentence(
            0,
            steps,
            "accept-reject draws are exact, independent draws of the target, so there is no "
            f"start to forget (the configured '{spec.policy}' policy is not applied; only a "
            "'fixed' burn-in is applied as asked)",
        ),
    )


def _decide_burn_in(stores: Sequence[Store], spec: BurnInSpec, steps: int) -> BurnInDecision:
    if isinstance(spec, FixedBurnIn):
        return burn_in_fixed(spec.steps, steps)
    if isinstance(spec, FractionBurnIn):
        return burn_in_fraction(spec.fraction, steps)
    if isinstance(spec, TauBurnIn):
        return burn_in_from_tau(tau_per_param(stores, steps), spec.multiple, steps)
    traces = [_walker_mean_log_prob(s, steps) for s in stores]
    if isinstance(spec, DefaultBurnIn):
        # each replica's own tau: the combined cut (the largest) is the same as with the
        # largest tau everywhere, and each per-replica entry records what that replica showed
        parts = [
            default_burn_in(t, taus, multiple=spec.multiple, max_fraction=spec.max_fraction)
            for t, taus in zip(traces, tau_per_replica(stores, steps), strict=True)
        ]
    elif isinstance(spec, MserBurnIn):
        parts = [
            burn_in_mser(t, batch_size=spec.batch_size, max_fraction=spec.max_fraction)
            for t in traces
        ]
    elif isinstance(spec, GewekeBurnIn):
        parts = [
            burn_in_geweke(t, z_crit=spec.z_crit, max_fraction=spec.max_fraction) for t in traces
        ]
    else:  # pragma: no cover - the config union is closed
        raise TypeError(f"unknown burn-in policy {spec!r}")
    return _combine(parts, steps)


def decide_thinning(stores: Sequence[Store], spec: ThinningSpec) -> ThinningDecision:
    """The thinning factor under ``spec`` for (already trimmed) replica stores.

    Raises
    ------
    StoreError
        If the stores are too short for the policy's method (the message names the minimum).
    """
    steps = min(s.steps_done for s in stores)
    try:
        return _decide_thinning(stores, spec, steps)
    except ValueError as e:
        raise _too_short("thinning", steps, e) from None


def _decide_thinning(stores: Sequence[Store], spec: ThinningSpec, steps: int) -> ThinningDecision:
    if isinstance(spec, NoThinning):
        return thin_none()
    if isinstance(spec, FixedThinning):
        return thin_fixed(spec.factor)
    if isinstance(spec, TargetThinning):
        return thin_to_target(steps, stores[0].walkers, spec.draws)
    taus = tau_per_param(stores, steps)
    if isinstance(spec, TauThinning):
        return thin_from_tau(taus, spec.fraction)
    if isinstance(spec, CostAwareThinning):
        slowest = max(taus, key=lambda k: taus[k])
        j = stores[0].param_names.index(slowest)
        acf = np.mean(
            [np.nanmean(autocorrelation(s.column(j, 0, steps).T), axis=0) for s in stores],
            axis=0,
        )
        lags = min(acf.size, max(2, int(20 * taus[slowest])))
        return thin_cost_aware(acf[:lags], spec.cost_ratio)
    raise TypeError(f"unknown thinning policy {spec!r}")  # pragma: no cover
