"""Convergence targets and the pass/fail verdict.

Defaults: ``max_rhat = 1.01`` and bulk/tail ESS >= 400 follow Vehtari,
Gelman, Simpson, Carpenter and Buerkner (2021), Bayesian Analysis 16(2)
(R-hat < 1.01; ESS > 100 per chain with 4 chains). ``min_steps_per_tau = 50``
is the emcee tolerance (common practice for ensembles, no formal source).
The optional multivariate-ESS target uses ``min_ess`` of Vats, Flegal and
Jones (2019), Biometrika 106(2).

A target set to ``None`` is not checked. A checked diagnostic that is
missing from the input, or is NaN, counts as a failure: the run cannot be
certified on a number nobody computed.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from ..diagnostics._jsonable import to_builtin
from ..diagnostics.multivariate import min_ess


@dataclass(frozen=True)
class Targets:
    """Thresholds a run must meet. ``None`` disables a check."""

    max_rhat: float | None = 1.01
    min_ess_bulk: float | None = 400.0
    min_ess_tail: float | None = 400.0
    min_steps_per_tau: float | None = 50.0
    mess_eps: float | None = None
    mess_alpha: float = 0.05


@dataclass(frozen=True)
class ParamCheck:
    """Outcome for one parameter: ``failures`` lists each failing number."""

    name: str
    ok: bool
    failures: tuple[str, ...]
    values: dict[str, float] = field(hash=False)


@dataclass(frozen=True)
class Verdict:
    """Overall verdict: ``ok`` only if every parameter and the mESS check pass."""

    ok: bool
    params: dict[str, ParamCheck] = field(hash=False)
    multivariate: dict[str, Any] | None = field(hash=False)
    lines: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        """Return a JSON-serialisable dict."""
        return {
            "ok": self.ok,
            "params": {
                name: {"ok": c.ok, "failures": list(c.failures), "values": to_builtin(c.values)}
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


def _steps_per_tau(diag: Mapping[str, float]) -> float | None:
    if "steps_per_tau" in diag:
        return float(diag["steps_per_tau"])
    if "tau" in diag and "draws" in diag:
        return float(diag["draws"]) / float(diag["tau"])
    return None


def _check_param(name: str, diag: Mapping[str, float], targets: Targets) -> ParamCheck:
    failures: list[str] = []
    values: dict[str, float] = {}
    checks: list[tuple[str, float | None, float | None, bool]] = [
        ("rhat", None if "rhat" not in diag else float(diag["rhat"]), targets.max_rhat, True),
        ("ess_bulk", diag.get("ess_bulk"), targets.min_ess_bulk, False),
        ("ess_tail", diag.get("ess_tail"), targets.min_ess_tail, False),
        ("steps_per_tau", _steps_per_tau(diag), targets.min_steps_per_tau, False),
    ]
    for key, value, limit, is_max in checks:
        if limit is None:
            continue
        if value is None:
            failures.append(f"{key} missing")
            continue
        value = float(value)
        values[key] = value
        if math.isnan(value):
            failures.append(f"{key} is nan")
        elif is_max and not value <= limit:
            failures.append(f"{key} {_fmt(value)} > {limit:g}")
        elif not is_max and not value >= limit:
            failures.append(f"{key} {_fmt(value)} < {limit:g}")
    return ParamCheck(name, not failures, tuple(failures), values)


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


def assess(
    diagnostics_per_param: Mapping[str, Mapping[str, float]],
    targets: Targets | None = None,
    *,
    multivariate_ess: float | None = None,
    n_params: int | None = None,
) -> Verdict:
    """Check per-parameter diagnostics against targets.

    Defaults follow Vehtari et al. (2021), Bayesian Analysis 16(2); the mESS
    rule follows Vats, Flegal & Jones (2019), Biometrika 106(2).

    Parameters
    ----------
    diagnostics_per_param : mapping of str to mapping
        ``{name: {"rhat": .., "ess_bulk": .., "ess_tail": .., "steps_per_tau": ..}}``;
        ``steps_per_tau`` may instead be given as ``tau`` and ``draws``.
    targets : Targets, optional
        Defaults to ``Targets()``.
    multivariate_ess : float, optional
        mESS of the joint chain, checked if ``targets.mess_eps`` is set.
    n_params : int, optional
        Dimension for ``min_ess``; defaults to the number of parameters given.

    Returns
    -------
    Verdict
    """
    targets = Targets() if targets is None else targets
    if not diagnostics_per_param:
        raise ValueError("diagnostics_per_param is empty")
    params = {
        str(name): _check_param(str(name), diag, targets)
        for name, diag in diagnostics_per_param.items()
    }
    mess = _check_mess(multivariate_ess, n_params or len(params), targets)
    lines: list[str] = []
    for check in params.values():
        if check.ok:
            shown = ", ".join(f"{k} {_fmt(v)}" for k, v in check.values.items())
            lines.append(f"{check.name}: ok ({shown})" if shown else f"{check.name}: ok")
        else:
            lines.append(f"{check.name}: FAIL " + "; ".join(check.failures))
    if mess is not None:
        lines.append(("ok: " if mess["ok"] else "FAIL: ") + mess["line"])
    n_fail = sum(not c.ok for c in params.values())
    ok = n_fail == 0 and (mess is None or mess["ok"])
    summary = f"Overall: {'ok' if ok else 'FAIL'} ({n_fail} of {len(params)} parameters failed"
    if mess is not None and not mess["ok"]:
        summary += "; multivariate ESS below target"
    lines.insert(0, summary + ")")
    return Verdict(ok, params, mess, tuple(lines))
