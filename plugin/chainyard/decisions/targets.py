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
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from ..diagnostics._jsonable import to_builtin
from ..diagnostics.multivariate import min_ess

#: The three questions, in the order they are reported.
QUESTIONS = ("mixing", "tau", "precision")

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
    "tau_growth": "tau: tau of the whole run / tau of its first half on rank-normalised draws "
    "(pooled over replicas); above the limit tau is still growing",
    "ess_bulk": "precision: bulk ESS, every walker of every replica as a chain",
    "ess_tail": "precision: tail ESS (5% and 95% quantiles), every walker as a chain",
    "mess": "precision: multivariate ESS of the replicas' walker-mean traces vs "
    "min_ess (Vats, Flegal and Jones 2019)",
}


@dataclass(frozen=True)
class Targets:
    """Thresholds a run must meet. ``None`` disables a check (module docstring: sources)."""

    max_nested_rhat: float | None = 1.01
    max_rhat: float | None = None
    min_ess_bulk: float | None = 400.0
    min_ess_tail: float | None = 400.0
    min_steps_per_tau: float | None = 50.0
    max_tau_growth: float | None = 1.3
    max_tail_rhat: float | None = 1.1
    mess_eps: float | None = None
    mess_alpha: float = 0.05


@dataclass(frozen=True)
class ParamCheck:
    """Outcome for one parameter: ``failures`` lists each failing number.

    ``checks`` maps each question (:data:`QUESTIONS`) to whether it passed;
    ``steps_needed`` is the estimated total steps (after burn-in) meeting the precision and
    tau targets, ``None`` when they are met or no estimate is possible.
    """

    name: str
    ok: bool
    failures: tuple[str, ...]
    values: dict[str, float] = field(hash=False)
    checks: dict[str, bool] = field(hash=False, default_factory=dict)
    steps_needed: int | None = None


@dataclass(frozen=True)
class Verdict:
    """Overall verdict: ``ok`` only if every parameter and the mESS check pass."""

    ok: bool
    params: dict[str, ParamCheck] = field(hash=False)
    multivariate: dict[str, Any] | None = field(hash=False)
    lines: tuple[str, ...]
    checks: dict[str, bool] = field(hash=False, default_factory=dict)
    steps: int | None = None
    more_steps: int | None = None
    stuck_walkers: dict[int, list[int]] = field(hash=False, default_factory=dict)
    minority_walkers: dict[int, list[int]] = field(hash=False, default_factory=dict)
    slow_chains: dict[int, list[dict[str, Any]]] = field(hash=False, default_factory=dict)
    replicas: int | None = None

    def to_dict(self) -> dict[str, Any]:
        """Return a JSON-serialisable dict."""
        return {
            "ok": self.ok,
            "checks": dict(self.checks),
            "steps": self.steps,
            "more_steps": self.more_steps,
            "stuck_walkers": {str(r): list(ws) for r, ws in self.stuck_walkers.items()},
            "minority_walkers": {str(r): list(ws) for r, ws in self.minority_walkers.items()},
            "slow_chains": {str(r): to_builtin(cs) for r, cs in self.slow_chains.items()},
            "replicas": self.replicas,
            "params": {
                name: {
                    "ok": c.ok,
                    "checks": dict(c.checks),
                    "failures": list(c.failures),
                    "values": to_builtin(c.values),
                    "steps_needed": c.steps_needed,
                }
                for name, c in self.params.items()
            },
            "multivariate": to_builtin(self.multivariate),
            "lines": list(self.lines),
        }


def _fmt(value: float) -> str:
    if not math.isfinite(value):
        return str(value)
    if abs(value) >= 100:
        return f"{value:,.0f}"
    return f"{value:.3g}" if abs(value) >= 1.1 else f"{value:.4f}"


def _fmt_key(key: str, value: float, limit: float | None = None) -> str:
    """R-hats with 4 decimals, the tau growth ratio with 2, other numbers by :func:`_fmt`;
    given the ``limit``, R-hat and tau growth get the digits that show its side of it."""
    if limit is not None and math.isfinite(value) and key.startswith(("rhat", "tau_growth")):
        from chainyard.display import beside_limit

        return beside_limit(value, limit, 4 if key.startswith("rhat") else 2)
    if math.isfinite(value) and key.startswith("rhat"):
        return f"{value:.4f}"
    if math.isfinite(value) and key == "tau_growth":
        return f"{value:.2f}"
    return _fmt(value)


def _steps_per_tau(diag: Mapping[str, float]) -> float | None:
    if "steps_per_tau" in diag and diag["steps_per_tau"] is not None:
        return float(diag["steps_per_tau"])
    if "tau" in diag and "draws" in diag:
        return float(diag["draws"]) / float(diag["tau"])
    return None


def _get(diag: Mapping[str, Any], key: str) -> float | None:
    value = diag.get(key)
    return None if value is None else float(value)


def _checks(diag: Mapping[str, Any], targets: Targets) -> list[tuple[str, str, Any, Any, bool]]:
    """(question, key, value, limit, is_max) for every check of one parameter."""
    return [
        ("mixing", "rhat_nested", _get(diag, "rhat_nested"), targets.max_nested_rhat, True),
        ("mixing", "rhat", _get(diag, "rhat"), targets.max_rhat, True),
        ("mixing", "rhat_tail", _get(diag, "rhat_tail"), targets.max_tail_rhat, True),
        ("tau", "steps_per_tau", _steps_per_tau(diag), targets.min_steps_per_tau, False),
        ("tau", "tau_growth", _get(diag, "tau_growth"), targets.max_tau_growth, True),
        ("precision", "ess_bulk", _get(diag, "ess_bulk"), targets.min_ess_bulk, False),
        ("precision", "ess_tail", _get(diag, "ess_tail"), targets.min_ess_tail, False),
    ]


#: Safety factor on the estimated steps still needed (stated in the advice): the long-run tau
#: is extrapolated from one noisy estimate, and a longer run's burn-in cut may grow.
STEPS_MARGIN = 1.25

#: The Sokal window constant of the verdict's tau (:func:`chainyard.diagnostics.integrated_time`).
WINDOW_C = 5.0

#: The growth ratio the model must predict at the suggested length, as a share of the
#: limit's distance from 1 (2/3: with limit 1.3 the model's ratio is 1.2, so that the
#: estimator's noise, sd about 0.03-0.04 at 50 steps per tau, rarely crosses the limit).
GROWTH_HEADROOM = 2.0 / 3.0

#: Largest correction of the tau estimate (reached at 20 estimated steps per tau); shorter
#: runs get at least twice their length instead.
MAX_TAU_CORRECTION = 2.0


def long_run_tau(tau: float, steps: int) -> float | None:
    """The long-run tau ``T`` from the windowed estimate on ``steps`` steps.

    Each walker's autocovariances are taken about its own sample mean, which biases every lag
    low by about ``tau sigma^2 / L``; summed over the ``2 M + 1`` lags of the Sokal window
    ``M = c tau`` this makes the estimate about ``T (1 - 2 c tau / L)`` (the order of the bias
    as in Sokal 1997, from memory; the constant ``2 c = 10`` checked by this project's study:
    on the correlated Gaussian, the estimate is 0.66, 0.75 and 0.87 of the long-run tau at 20,
    31 and 50 steps per tau, where the model gives 0.66, 0.75 and 0.85). So
    ``T = tau / (1 - 2 c tau / L)``.

    Returns
    -------
    float or None
        ``T`` (steps); ``None`` when the run is too short for the correction (fewer than
        ``2 c MAX_TAU_CORRECTION / (MAX_TAU_CORRECTION - 1)`` estimated steps per tau).
    """
    if not (math.isfinite(tau) and tau > 0 and steps > 0):
        return None
    shrink = 1.0 - 2.0 * WINDOW_C * tau / steps
    if shrink < 1.0 / MAX_TAU_CORRECTION:
        return None
    return tau / shrink


def steps_needed(
    diag: Mapping[str, Any], targets: Targets, steps: int, failed: set[str]
) -> int | None:
    """Estimated total steps (after burn-in) that would meet the failed precision/tau targets.

    With the long-run tau ``T`` (:func:`long_run_tau`), the estimate at ``L'`` steps is
    ``tau(L') = T / (1 + 2 c T / L')``; so

    * the 50-tau rule (``L' / tau(L') >= k``) needs ``L' >= (k - 2 c) T`` (with the defaults
      40 long-run taus: the effective gate, see the module docstring);
    * the growth check needs the model's ``tau(L') / tau(L'/2) = (1 + 4 c T / L') / (1 + 2 c
      T / L')`` at most ``g = 1 + GROWTH_HEADROOM (max_tau_growth - 1)``, i.e. ``L' >= 2 c (2
      - g) T / (g - 1)``;
    * ESS grows in proportion to the steps (a stationary chain).

    The largest of these times :data:`STEPS_MARGIN` is returned (at least ``steps + 1``). A
    run too short for the tau correction gets at least twice its length. Measured pass rates
    after following it once: ``tests/benchmarks/RESULTS.md``.

    Parameters
    ----------
    diag : mapping
        ``ess_bulk``, ``ess_tail``, ``tau`` (steps) as available.
    targets : Targets
    steps : int
        Steps per walker after burn-in the diagnostics were computed on.
    failed : set of str
        Keys of the failed checks.

    Returns
    -------
    int or None
        ``None`` if no failed check is a precision or tau check or none can be estimated.
    """
    tau = _get(diag, "tau")
    big_t = long_run_tau(tau, steps) if tau is not None else None
    two_c = 2.0 * WINDOW_C
    need: list[float] = []
    k = targets.min_steps_per_tau
    tau_failed = {"steps_per_tau", "tau_growth"} & failed
    if tau_failed and big_t is None:
        need.append(2.0 * steps)
    if "steps_per_tau" in failed and k and big_t is not None:
        need.append(max(k - two_c, 1.0) * big_t)
    limit = targets.max_tau_growth
    if "tau_growth" in failed and big_t is not None and limit is not None and limit > 1.0:
        g = 1.0 + GROWTH_HEADROOM * (limit - 1.0)
        need.append(two_c * max(2.0 - g, 0.0) * big_t / (g - 1.0))
    for key, target in (("ess_bulk", targets.min_ess_bulk), ("ess_tail", targets.min_ess_tail)):
        value = _get(diag, key)
        if key in failed and target is not None and value is not None and value > 0:
            need.append(steps * target / value)
    need = [n * STEPS_MARGIN for n in need if math.isfinite(n)]
    if not need:
        return None
    return max(math.ceil(max(need)), steps + 1)


def _check_param(
    name: str, diag: Mapping[str, Any], targets: Targets, steps: int | None
) -> ParamCheck:
    failures: list[str] = []
    failed: set[str] = set()
    values: dict[str, float] = {}
    checks = dict.fromkeys(QUESTIONS, True)
    for question, key, value, limit, is_max in _checks(diag, targets):
        if limit is None:
            continue
        if value is None:
            failures.append(f"{key} missing")
        else:
            values[key] = value
            if math.isnan(value):
                failures.append(f"{key} is nan")
            elif is_max and not value <= limit:
                failures.append(f"{key} {_fmt_key(key, value, limit)} > {limit:g}")
            elif not is_max and not value >= limit:
                failures.append(f"{key} {_fmt_key(key, value, limit)} < {limit:g}")
            else:
                continue
        failed.add(key)
        checks[question] = False
    needed = None
    if steps is not None and not (checks["precision"] and checks["tau"]):
        needed = steps_needed(diag, targets, steps, failed)
    return ParamCheck(name, not failures, tuple(failures), values, checks, needed)


def _check_mess(
    multivariate_ess: float | None, n_params: int, targets: Targets
) -> dict[str, Any] | None:
    if targets.mess_eps is None:
        return None
    required = min_ess(n_params, alpha=targets.mess_alpha, eps=targets.mess_eps)
    value = None if multivariate_ess is None else float(multivariate_ess)
    ok = value is not None and math.isfinite(value) and value >= required
    if value is None:
        line = "multivariate ESS missing"
    else:
        cmp = ">=" if ok else "<"
        line = (
            f"multivariate ESS {_fmt(value)} {cmp} {required:,} required for "
            f"eps={targets.mess_eps:g} at {1 - targets.mess_alpha:.0%} with p={n_params}"
        )
    return {"ok": ok, "value": value, "required": required, "p": n_params, "line": line}


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
            "different shares, stuck walkers, or walkers in a minority region); more steps "
            "may not help: look at the traces."
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
