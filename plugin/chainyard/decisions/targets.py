"""Convergence targets and the pass/fail verdict, in three separate questions.

1. **mixing** (did the replicas forget their start and agree?): nested R-hat
   (Margossian et al. 2024, Bayesian Analysis; replicas as superchains, walkers as chains,
   see :mod:`chainyard.diagnostics.nested`) at most ``max_nested_rhat`` (default 1.01, the
   paper's ``delta = 0.01``, from memory; checked by simulation, see below). The classic
   rank-normalised split R-hat on one walker-mean trace per replica (Vehtari et al. 2021,
   Bayesian Analysis 16(2)) is always reported and gates only if ``max_rhat`` is set: its
   within-chain variance is that of a walker *mean* (about sigma^2 / walkers), so on healthy
   runs it exceeds 1.01 until about 200 steps per tau (measured: 89% of healthy 4 x 32 runs
   failed at ~100 steps per tau). Nested R-hat on healthy 4 x 32 runs stayed below 1.0011 at
   40-160 steps per tau (see :mod:`chainyard.diagnostics.nested`).
2. **tau** (can the autocorrelation estimate be trusted?): ``steps / tau >=
   min_steps_per_tau`` (50: the emcee tolerance, common practice for ensembles, no formal
   source) and the estimate has stopped growing: ``tau(whole) / tau(first half) <=
   max_tau_growth``. The windowed estimator is biased low on short runs (Sokal 1997; the
   emcee documentation advises running until the estimate stops changing, from memory), so a
   run whose tau keeps growing as it gets longer has not yet seen its slowest behaviour. tau
   is the mean of the replicas' estimates (each walker-averaged; the largest is reported).
   ``max_tau_growth = 1.3`` is chosen from simulations (this project; emcee, 4 x 32 walkers):
   on healthy runs the ratio is above 1 because the estimator's low bias shrinks with length
   (median 1.20, 95th percentile 1.27-1.30 at 50 steps per tau; at most 1.20 at 80 and 1.14
   at 160 steps per tau on a 4-D normal); on centred eight schools it was 1.34-1.97 at every
   length from 1,000 to 64,000 steps (there nested R-hat stays below 1.01 and ESS and steps
   per tau can pass: this check is what fails the biased long runs).
3. **precision** (are the numbers precise enough?): bulk and tail ESS (Vehtari et al. 2021;
   400 = 100 per chain for 4 chains) and, if ``relative_precision`` is set, the multivariate
   ESS against ``min_ess`` of Vats, Flegal and Jones (2019), Biometrika 106(2).

A target set to ``None`` is not checked. A checked diagnostic that is missing from the
input, or is NaN, counts as a failure: the run cannot be certified on a number nobody
computed.

When precision or tau fails, :func:`steps_needed` estimates how many steps would meet the
targets: it models the windowed tau estimate's low bias (:func:`long_run_tau`), ESS in
proportion to the steps, and adds a stated margin (:data:`STEPS_MARGIN`).

**The effective tau gate.** The gate is on the *estimated* tau, which is biased low on
short runs (:func:`long_run_tau`): ``steps / tau_hat >= 50`` is met at about 40-46 steps per
long-run tau (the model: 40; measured on the study's healthy targets, the estimate at 50
steps per long-run tau is 0.87-0.91 of it, so 50 estimated means about 44-46). The gate is
kept on the estimate, as emcee's tolerance is; the steps still needed use the model.

This module judges the run (:func:`assess`: the verdict's lines, its summary and the advice);
the records live in :mod:`chainyard.decisions.verdict_records`, each parameter's checks in
:mod:`chainyard.decisions.target_checks` and the steps still needed in
:mod:`chainyard.decisions.more_steps` (their public names re-exported here).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from .more_steps import STEPS_MARGIN, long_run_tau, steps_needed
from .target_checks import _check_mess, _check_param, _fmt_key
from .verdict_records import QUESTIONS, ParamCheck, Targets, Verdict

__all__ = [
    "QUESTIONS",
    "STEPS_MARGIN",
    "WHAT_EACH_CHECK_COMPARES",
    "ParamCheck",
    "Targets",
    "Verdict",
    "assess",
    "long_run_tau",
    "steps_needed",
]

#: What each check compares (one line each, printed under the table and in the records).
WHAT_EACH_CHECK_COMPARES = {
    "rhat_nested": "mixing: nested R-hat, spread of the replica means vs the posterior sd "
    "(replicas as superchains, walkers as chains; Margossian et al. 2024)",
    "rhat": "mixing (reported; gates only if max_rhat is set): split R-hat of one walker-mean "
    "trace per replica (Vehtari et al. 2021)",
    "steps_per_tau": "tau: steps after burn-in / tau (mean of the per-replica estimates, walkers "
    "averaged; "
    "Foreman-Mackey et al. 2013)",
    "rhat_tail": "mixing: split R-hat of each replica's share of draws in the 5% and 95% "
    "tails over time (do all replicas, and both halves of each, visit the tails equally?)",
    "tail_move_ratio": "mixing: how often a parameter moves from its lowest or highest 5% "
    "over how often it moves overall (far below 1: the sampler can hardly move there, as in "
    "a funnel's neck)",
    "tau_growth": "tau: tau of the whole run / tau of its first half on rank-normalised draws "
    "(pooled over replicas); above the limit tau is still growing",
    "ess_bulk": "precision: bulk ESS, every walker of every replica as a chain",
    "ess_tail": "precision: tail ESS (5% and 95% quantiles), every walker as a chain",
    "mess": "precision: multivariate ESS of the replicas' walker-mean traces vs "
    "min_ess (Vats, Flegal and Jones 2019)",
}


def _advice(checks: dict[str, bool], more_steps: int | None, steps: int | None) -> list[str]:
    lines = []
    if not checks["tau"]:
        lines.append("tau: still growing or too few steps per tau: run longer.")
    if more_steps is not None and steps is not None:
        lines.append(
            f"Estimated steps to meet the precision/tau targets: about {more_steps:,} more "
            f"({steps + more_steps:,} after burn-in; models the tau estimate's low bias on "
            f"short runs, ESS in proportion to the steps, and adds {STEPS_MARGIN - 1:.0%})."
        )
    if not checks["mixing"]:
        lines.append(
            "mixing: the replicas disagree (different starts not forgotten, modes held in "
            "different shares, stuck walkers, or walkers in a minority region) or the sampler "
            "hardly moves in a parameter's tail (a funnel's neck: try a non-centred "
            "parameterisation); more steps may not help: look at the traces."
        )
    return lines


def assess(
    diagnostics_per_param: Mapping[str, Mapping[str, float]],
    targets: Targets | None = None,
    *,
    multivariate_ess: float | None = None,
    n_params: int | None = None,
    steps: int | None = None,
    stuck_walkers: Mapping[int, Sequence[int]] | None = None,
    minority_walkers: Mapping[int, Sequence[int]] | None = None,
    slow_chains: Mapping[int, Sequence[Mapping[str, Any]]] | None = None,
    replicas: int | None = None,
) -> Verdict:
    """Check per-parameter diagnostics against targets, question by question.

    Sources of the checks and defaults: module docstring.

    Parameters
    ----------
    diagnostics_per_param : mapping of str to mapping
        ``{name: {"rhat_nested": .., "rhat": .., "ess_bulk": .., "ess_tail": ..,
        "steps_per_tau": .., "tau_growth": .., "tau": ..}}``; ``steps_per_tau`` may instead
        be given as ``tau`` and ``draws``.
    targets : Targets, optional
        Defaults to ``Targets()``.
    multivariate_ess : float, optional
        mESS of the joint chain, checked if ``targets.mess_eps`` is set.
    n_params : int, optional
        Dimension for ``min_ess``; defaults to the number of parameters given.
    steps : int, optional
        Steps per walker after burn-in; enables the estimate of the steps still needed.
    stuck_walkers : mapping of int to sequence of int, optional
        Stuck walkers per replica (:func:`chainyard.diagnostics.acceptance_report`); any
        fails the mixing question: a walker that stopped moving does not sample the target.
    minority_walkers : mapping of int to sequence of int, optional
        Walkers that move but whose acceptance is far below their ensemble's: they hold a
        region most walkers are not in (:mod:`chainyard.analysis.low_acceptance`); any fails
        the mixing question, in its own words.
    slow_chains : mapping of int to sequence of mapping, optional
        Independent chains with low acceptance whose own ESS meets their share (``chain``,
        ``acceptance``, ``own_ess_bulk``, ``required``): reported, not a failure.
    replicas : int, optional
        Number of replicas; with one, the verdict says that mixing compared only the run's
        halves and recommends 4 replicas.

    Returns
    -------
    Verdict
    """
    targets = Targets() if targets is None else targets
    if not diagnostics_per_param:
        raise ValueError("diagnostics_per_param is empty")
    params = {
        str(name): _check_param(str(name), diag, targets, steps)
        for name, diag in diagnostics_per_param.items()
    }
    mess = _check_mess(multivariate_ess, n_params or len(params), targets)
    checks = {q: all(c.checks[q] for c in params.values()) for q in QUESTIONS}
    needed = [c.steps_needed for c in params.values() if c.steps_needed is not None]
    if mess is not None and not mess["ok"]:
        checks["precision"] = False
        value = mess["value"]
        if steps is not None and value is not None and math.isfinite(value) and value > 0:
            needed.append(math.ceil(steps * mess["required"] / value))
    more_steps = max(needed) - steps if needed and steps is not None else None
    stuck = {int(r): [int(w) for w in ws] for r, ws in (stuck_walkers or {}).items() if len(ws)}
    minority = {
        int(r): [int(w) for w in ws] for r, ws in (minority_walkers or {}).items() if len(ws)
    }
    slow = {int(r): [dict(c) for c in cs] for r, cs in (slow_chains or {}).items() if len(cs)}
    if stuck or minority:
        checks["mixing"] = False
    lines: list[str] = []
    for check in params.values():
        if check.ok:
            shown = ", ".join(f"{k} {_fmt_key(k, v)}" for k, v in check.values.items())
            lines.append(f"{check.name}: ok ({shown})" if shown else f"{check.name}: ok")
        else:
            lines.append(f"{check.name}: FAIL " + "; ".join(check.failures))
    if mess is not None:
        lines.append(("ok: " if mess["ok"] else "FAIL: ") + mess["line"])
    if stuck:
        shown = "; ".join(
            f"replica {r}: walker{'s' if len(ws) > 1 else ''} "
            + ", ".join(map(str, ws[:10]))
            + (" ..." if len(ws) > 10 else "")
            for r, ws in sorted(stuck.items())
        )
        lines.append(
            f"FAIL: stuck walkers (acceptance far below their ensemble's and they barely "
            f"move): {shown}"
        )
    if minority:
        lines.append(
            "FAIL: walkers in a minority region (they move, but their acceptance is far below "
            "their ensemble's: they hold a mode or region most walkers are not in): "
            + _listing(minority, "walker")
        )
    for r, cs in sorted(slow.items()):
        for c in cs:
            lines.append(
                f"note: replica {r}: chain {c['chain']} is slow, not stuck (acceptance "
                f"{c['acceptance']:.3f}, far below the median; its own bulk ESS "
                f"{c['own_ess_bulk']:.0f} >= {c['required']:.3g}, its share of the target): "
                "not a failure"
            )
    if replicas == 1:
        lines.append(
            "note: 1 replica: mixing compared only the two halves of this run (a drift check); "
            "nothing compared independent starts, so a mode or region the run never reached "
            "cannot show. Run 4 replicas (sampler.replicas: 4)."
        )
    n_fail = sum(not c.ok for c in params.values())
    ok = n_fail == 0 and (mess is None or mess["ok"]) and not stuck and not minority
    summary = f"Overall: {'ok' if ok else 'FAIL'} ({n_fail} of {len(params)} parameters failed"
    if mess is not None and not mess["ok"]:
        summary += "; multivariate ESS below target"
    if stuck:
        summary += "; stuck walkers"
    if minority:
        summary += "; walkers in a minority region"
    words = {q: "ok" if checks[q] else "FAIL" for q in QUESTIONS}
    if replicas == 1 and checks["mixing"]:
        words["mixing"] = "ok within one replica only"
    summary += "; " + ", ".join(f"{q} {words[q]}" for q in QUESTIONS)
    lines.insert(0, summary + ")")
    lines.extend(_advice(checks, more_steps, steps))
    return Verdict(
        ok, params, mess, tuple(lines), checks, steps, more_steps, stuck, minority, slow, replicas
    )


def _listing(found: Mapping[int, Sequence[int]], noun: str) -> str:
    """'replica 0: walker 3; replica 2: walkers 1, 5' (at most 10 per replica)."""
    return "; ".join(
        f"replica {r}: {noun}{'s' if len(ws) > 1 else ''} "
        + ", ".join(map(str, ws[:10]))
        + (" ..." if len(ws) > 10 else "")
        for r, ws in sorted(found.items())
    )
