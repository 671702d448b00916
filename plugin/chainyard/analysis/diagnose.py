"""Convergence diagnostics across a run's replicas, with a verdict against the targets.

What is compared (documented in every diagnostics record):

* **R-hat** (rank-normalised split R-hat, max of bulk and folded; Vehtari et al. 2021,
  Bayesian Analysis 16(2)) compares *independent replicas*: each replica contributes one
  chain, its walker-mean trace. Walkers of one ensemble are not independent chains (each
  move uses the others), so they are never treated as separate chains for R-hat. With one
  replica R-hat only compares the halves of that run.
* **ESS and MCSE** (bulk, tail, mean, quantiles; same paper) treat every walker of every
  replica as a chain, the usual practice for ensembles; cross-walker correlation makes them
  somewhat optimistic, so ``ess_tau`` (draws / tau, Sokal 1997) is reported beside them.
* **Autocorrelation time** per replica with walkers averaged (Foreman-Mackey et al. 2013);
  the largest over replicas is reported, with steps per tau and the 50 x tau rule.
* **Multivariate ESS** (Vats, Flegal and Jones 2019, Biometrika 106(2)) on the walker-mean
  traces of all replicas.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from chainyard.config import TargetsSpec
from chainyard.decisions import Targets, assess
from chainyard.diagnostics import (
    acceptance_report,
    ensemble_to_chains,
    ess_bulk,
    ess_tail,
    integrated_time_report,
    mcse_mean,
    mcse_quantile,
    min_ess,
    multivariate_ess,
    rhat,
    rhat_bulk,
    rhat_folded,
)
from chainyard.store import Store

__all__ = ["WHAT_IS_COMPARED", "diagnose", "format_table"]

WHAT_IS_COMPARED = (
    "R-hat: one chain per independent replica (its walker-mean trace). ESS/MCSE: every walker "
    "of every replica as a chain. tau: per replica, walkers averaged; largest reported. "
    "mESS: walker-mean traces of all replicas."
)


def _finite(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


def _param_diagnostics(
    stores: Sequence[Store], j: int, steps: int, min_steps_per_tau: float
) -> dict[str, Any]:
    cols = [s.column(j, 0, steps) for s in stores]  # each (steps, walkers)
    replica_chains = ensemble_to_chains(cols, "walker_mean")
    walker_chains = ensemble_to_chains(cols, "walkers")
    flat = walker_chains.reshape(-1)
    reports = [integrated_time_report(c.T, min_steps_per_tau=min_steps_per_tau) for c in cols]
    tau = max(r.tau for r in reports)
    draws_total = flat.size
    q05, q50, q95 = np.quantile(flat, [0.05, 0.5, 0.95])
    out = {
        "mean": float(flat.mean()),
        "sd": float(flat.std(ddof=1)),
        "q05": float(q05),
        "q50": float(q50),
        "q95": float(q95),
        "rhat": _finite(rhat(replica_chains)),
        "rhat_bulk": _finite(rhat_bulk(replica_chains)),
        "rhat_folded": _finite(rhat_folded(replica_chains)),
        "ess_bulk": _finite(ess_bulk(walker_chains)),
        "ess_tail": _finite(ess_tail(walker_chains)),
        "ess_tau": float(draws_total / tau) if tau > 0 else None,
        "mcse_mean": _finite(mcse_mean(walker_chains)),
        "mcse_q05": _finite(mcse_quantile(walker_chains, 0.05)),
        "mcse_q95": _finite(mcse_quantile(walker_chains, 0.95)),
        "tau": float(tau),
        "tau_per_replica": [float(r.tau) for r in reports],
        "steps_per_tau": float(steps / tau) if tau > 0 else None,
        "tau_reliable": all(r.reliable for r in reports),
        "tau_messages": [r.message for r in reports if r.message],
    }
    return out


def diagnose(stores: Sequence[Store], targets: TargetsSpec | None = None) -> dict[str, Any]:
    """Diagnostics per parameter, acceptance per replica, mESS, and the verdict.

    Parameters
    ----------
    stores : sequence of Store
        The replicas of one run (after burn-in), same parameters and walkers.
    targets : TargetsSpec, optional
        Targets for the verdict (default: the first store's config targets).

    Returns
    -------
    dict
        JSON-ready: ``params``, ``acceptance``, ``multivariate``, ``verdict``, ``steps``,
        ``walkers``, ``replicas``, ``what_is_compared``.
    """
    targets = targets or stores[0].config.targets
    steps = min(s.steps_done for s in stores)
    names = stores[0].param_names
    params = {
        name: _param_diagnostics(stores, j, steps, targets.min_steps_per_tau)
        for j, name in enumerate(names)
    }
    acceptance = []
    for s in stores:
        rep = acceptance_report(s.accepted(0, steps))
        acceptance.append({"replica": s.replica, **rep.to_dict()})
        acceptance[-1]["messages"] = [f"replica {s.replica}: {m}" for m in rep.messages]
    means = np.stack(
        [
            np.stack([s.column(j, 0, steps).mean(axis=1) for j in range(len(names))], axis=-1)
            for s in stores
        ]
    )  # (replicas, steps, params)
    try:
        mess = float(multivariate_ess(means))
    except ValueError:
        mess = float("nan")
    multivariate = {
        "ess": _finite(mess),
        "min_ess_required": (
            int(min_ess(len(names), eps=targets.relative_precision))
            if targets.relative_precision
            else None
        ),
    }
    verdict = assess(
        {
            n: {
                k: (np.nan if params[n][k] is None else params[n][k])
                for k in ("rhat", "ess_bulk", "ess_tail", "steps_per_tau")
            }
            for n in names
        },
        Targets(
            max_rhat=targets.max_rhat,
            min_ess_bulk=targets.min_ess_bulk,
            min_ess_tail=targets.min_ess_tail,
            min_steps_per_tau=targets.min_steps_per_tau,
            mess_eps=targets.relative_precision,
        ),
        multivariate_ess=multivariate["ess"],
        n_params=len(names),
    )
    bad_acceptance = [a for a in acceptance if a["messages"]]
    return {
        "replicas": len(stores),
        "steps": steps,
        "walkers": stores[0].walkers,
        "params": params,
        "acceptance": acceptance,
        "acceptance_warnings": [m for a in bad_acceptance for m in a["messages"]],
        "multivariate": multivariate,
        "verdict": verdict.to_dict(),
        "targets": targets.model_dump(mode="json"),
        "what_is_compared": WHAT_IS_COMPARED,
    }


def _num(value: Any, fmt: str) -> str:
    return "-" if value is None else format(value, fmt)


def format_table(result: dict[str, Any], title: str = "") -> str:
    """A plain-text table of the diagnostics with the verdict (for terminals and logs)."""
    head = (
        f"{'parameter':<16}{'mean':>12}{'sd':>11}{'MCSE':>10}{'R-hat':>8}"
        f"{'ESS bulk':>10}{'ESS tail':>10}{'tau':>8}{'steps/tau':>10}  check"
    )
    lines = []
    if title:
        lines.append(title)
    lines.append(
        f"{result['replicas']} replica(s) x {result['walkers']} walkers x "
        f"{result['steps']:,} steps (after burn-in)"
    )
    lines.append(head)
    lines.append("-" * len(head))
    checks = result["verdict"]["params"]
    for name, d in result["params"].items():
        ok = checks[name]["ok"]
        lines.append(
            f"{name[:15]:<16}{_num(d['mean'], '12.5g')}{_num(d['sd'], '11.4g')}"
            f"{_num(d['mcse_mean'], '10.3g')}{_num(d['rhat'], '8.3f')}"
            f"{_num(d['ess_bulk'], '10.0f')}{_num(d['ess_tail'], '10.0f')}"
            f"{_num(d['tau'], '8.1f')}{_num(d['steps_per_tau'], '10.1f')}  "
            + ("ok" if ok else "FAIL")
        )
    lines.append("")
    lines.extend(result["verdict"]["lines"])
    lines.extend(f"warning: {m}" for m in result["acceptance_warnings"])
    lines.append("Diagnostics can show non-convergence; they cannot prove convergence.")
    return "\n".join(lines)
