"""Each parameter's checks against the targets, and the multivariate ESS check.

:func:`_check_param` runs every check of one parameter (:func:`_checks`: question, value,
limit) and estimates the steps still needed; :func:`_check_mess` checks the multivariate ESS;
:func:`_fmt` and :func:`_fmt_key` format the numbers the verdict's lines show.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from ..diagnostics.multivariate import min_ess
from .more_steps import _get, steps_needed
from .verdict_records import QUESTIONS, ParamCheck, Targets

#: checks skipped when their statistic is absent: not defined for every run (accept-reject
#: draws; nothing ever moved, which other checks catch) nor in records written before it
ONLY_WHEN_COMPUTED = frozenset({"tail_move_ratio"})


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


def _checks(diag: Mapping[str, Any], targets: Targets) -> list[tuple[str, str, Any, Any, bool]]:
    """(question, key, value, limit, is_max) for every check of one parameter."""
    return [
        ("mixing", "rhat_nested", _get(diag, "rhat_nested"), targets.max_nested_rhat, True),
        ("mixing", "rhat", _get(diag, "rhat"), targets.max_rhat, True),
        ("mixing", "rhat_tail", _get(diag, "rhat_tail"), targets.max_tail_rhat, True),
        (
            "mixing",
            "tail_move_ratio",
            _get(diag, "tail_move_ratio"),
            targets.min_tail_move_ratio,
            False,
        ),
        ("tau", "steps_per_tau", _steps_per_tau(diag), targets.min_steps_per_tau, False),
        ("tau", "tau_growth", _get(diag, "tau_growth"), targets.max_tau_growth, True),
        ("precision", "ess_bulk", _get(diag, "ess_bulk"), targets.min_ess_bulk, False),
        ("precision", "ess_tail", _get(diag, "ess_tail"), targets.min_ess_tail, False),
    ]


def _check_param(
    name: str, diag: Mapping[str, Any], targets: Targets, steps: int | None
) -> ParamCheck:
    failures: list[str] = []
    failed: set[str] = set()
    values: dict[str, float] = {}
    checks = dict.fromkeys(QUESTIONS, True)
    for question, key, value, limit, is_max in _checks(diag, targets):
        if limit is None or (value is None and key in ONLY_WHEN_COMPUTED):
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
