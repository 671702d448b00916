"""The verdict's records: the targets a run is checked against and the outcomes.

:class:`Targets` holds the thresholds (sources of the defaults:
:mod:`chainyard.decisions.targets`); :class:`ParamCheck` and :class:`Verdict` are the frozen
outcomes whose ``to_dict()`` output is JSON-serialisable; :data:`QUESTIONS` names the three
questions.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from ..diagnostics._jsonable import to_builtin

#: The three questions, in the order they are reported.
QUESTIONS = ("mixing", "tau", "precision")


@dataclass(frozen=True)
class Targets:
    """Thresholds a run must meet. ``None`` disables a check.

    Sources of the checks and defaults: :mod:`chainyard.decisions.targets`.
    """

    max_nested_rhat: float | None = 1.01
    max_rhat: float | None = None
    min_ess_bulk: float | None = 400.0
    min_ess_tail: float | None = 400.0
    min_steps_per_tau: float | None = 50.0
    max_tau_growth: float | None = 1.3
    max_tail_rhat: float | None = 1.1
    min_tail_move_ratio: float | None = 0.35
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
