"""Judge one simulated run as the pipeline does: default burn-in, then ``diagnose`` with the
default targets; the run passes when ``diagnose --strict`` would exit 0 (``verdict.ok``).

Also: whether the run's mean or sd is more than 4 MCSE off the reference (the run's own MCSE
and the reference's, combined), and whether each parameter's 90% MCSE interval covers the
reference mean.
"""

from __future__ import annotations

import importlib
import re
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from chainyard.analysis.decide import decide_burn_in
from chainyard.config import DefaultBurnIn, TargetsSpec
from chainyard.diagnostics import mcse_sd
from chainyard.errors import ChainyardError

from .targets import Target

FloatArray = npt.NDArray[np.float64]

Z90 = 1.6448536269514722  # standard normal 95% quantile (two-sided 90% interval)
BIAS_MCSE = 4.0


class ArrayReplica:
    """The part of :class:`chainyard.store.Store` that burn-in and ``diagnose`` read, on arrays.

    ``draws`` (steps, walkers, d), ``log_prob`` and ``accepted`` (steps, walkers); ``start``
    drops that many leading steps (a trimmed view, as a derived store after burn-in).
    """

    def __init__(
        self,
        draws: FloatArray,
        log_prob: FloatArray,
        accepted: npt.NDArray[np.bool_],
        replica: int,
        names: tuple[str, ...],
        start: int = 0,
        kind: str = "ensemble",
    ) -> None:
        self.attrs = {"sampler_kind": kind}  # read by burn-in (accept-reject: none) and diagnose
        self._draws = draws[start:]
        self._lp = log_prob[start:]
        self._acc = accepted[start:]
        self.replica = replica
        self.param_names = names
        self.walkers = draws.shape[1]
        self.steps_done = self._draws.shape[0]
        self.chunk_steps = 1024
        self.config = None

    def column(self, j: int | str, start: int = 0, stop: int | None = None) -> FloatArray:
        """One parameter, shape (steps, walkers)."""
        k = self.param_names.index(j) if isinstance(j, str) else int(j)
        return np.asarray(self._draws[start:stop, :, k])

    def log_prob(self, start: int = 0, stop: int | None = None) -> FloatArray:
        """Log density, shape (steps, walkers)."""
        return np.asarray(self._lp[start:stop])

    def accepted(self, start: int = 0, stop: int | None = None) -> npt.NDArray[np.bool_]:
        """Acceptance flags, shape (steps, walkers)."""
        return np.asarray(self._acc[start:stop])

    def draws(self, start: int = 0, stop: int | None = None) -> FloatArray:
        """Positions, shape (steps, walkers, d)."""
        return np.asarray(self._draws[start:stop])


def check_name(failure: str) -> str:
    """The check a failure line names: its words before the first number or comparison."""
    m = re.match(r"[^\d<>=(:;]+", failure)
    name = (m.group() if m else failure).strip()
    for suffix in (" is nan", " missing", " is"):
        name = name.removesuffix(suffix)
    return name or failure


@dataclass
class Judgement:
    """Outcome of one run (see the module docstring)."""

    ok: bool
    checks: set[str]
    warnings: list[str]
    burn_in: int
    steps_kept: int
    biased: bool
    bias_detail: str
    covered: list[bool]
    lines: list[str] = field(default_factory=list)
    stats: dict[str, float | None] = field(default_factory=dict)


#: per-run extremes over parameters recorded for the study: (key, max or min)
STATS = (
    ("rhat_nested", max),
    ("rhat", max),
    ("tau_growth", max),
    ("tau_growth_raw", max),
    ("rhat_tail", max),
    ("tail_move_ratio", min),
    ("steps_per_tau", min),
    ("ess_bulk", min),
    ("ess_tail", min),
)


def _stats(result: dict[str, Any]) -> dict[str, float | None]:
    out: dict[str, float | None] = {}
    for key, pick in STATS:
        values = [p.get(key) for p in result["params"].values()]
        values = [float(v) for v in values if v is not None]
        out[key] = pick(values) if values else None
    more = result.get("more_steps")
    out["more_steps"] = None if more is None else float(more)
    return out


def _diagnose(
    draws: FloatArray,
    accepted: npt.NDArray[np.bool_],
    names: tuple[str, ...],
    move_kinds: tuple[str, ...] | None,
    kind: str = "ensemble",
) -> dict[str, Any]:
    """``diagnose`` on arrays after burn-in, default targets (``diagnose_arrays``)."""
    mod = importlib.import_module("chainyard.analysis.diagnose")
    kwargs: dict[str, Any] = {"accepted": accepted, "names": list(names), "kind": kind}
    if move_kinds is not None:
        kwargs["move_kinds"] = list(move_kinds)
    return mod.diagnose_arrays(draws, TargetsSpec(), **kwargs)


def judge(
    target: Target,
    draws: FloatArray,
    log_prob: FloatArray,
    accepted: npt.NDArray[np.bool_],
    move_kinds: tuple[str, ...] | None = None,
    *,
    kind: str = "ensemble",
) -> Judgement:
    """Judge one run: ``draws`` (replicas, steps, walkers, d), the others (replicas, steps,
    walkers); ``move_kinds`` as the run config names its moves (None: the stretch move);
    ``kind`` the sampler kind (the basis of R-hat and ESS, and the low-acceptance rules)."""
    names = target.names
    full = [
        ArrayReplica(draws[k], log_prob[k], accepted[k], k, names, kind=kind)
        for k in range(draws.shape[0])
    ]
    try:
        cut = decide_burn_in(full, DefaultBurnIn(policy="default")).steps_discarded  # type: ignore[arg-type]
        result = _diagnose(draws[:, cut:], accepted[:, cut:], names, move_kinds, kind)
    except (ValueError, ChainyardError) as exc:  # too short for a method: the run is not ok
        return Judgement(False, {"refused"}, [], 0, 0, False, "", [], [f"refused: {exc}"])
    verdict = result["verdict"]
    checks: set[str] = set()
    for p in verdict["params"].values():
        checks.update(check_name(f) for f in p["failures"])
    if any(verdict.get("stuck_walkers", {}).values()):
        checks.add("stuck walkers")
    if any(verdict.get("minority_walkers", {}).values()):
        checks.add("minority region")
    run_level = verdict.get("checks")  # {question: passed}: named only if no failure line is
    if isinstance(run_level, dict) and not checks:
        checks.update(f"run:{k}" for k, v in run_level.items() if v is False)
    mv = verdict.get("multivariate")
    if mv and not mv.get("ok", True):
        checks.add("multivariate ESS")
    if not verdict["ok"] and not checks:
        checks.add("other")
    ref_m, ref_s = target.mcse_ref()
    biased = False
    detail = []
    covered = []
    kept_draws = draws[:, cut:]
    for j, name in enumerate(names):
        d = result["params"][name]
        m_err = np.hypot(d["mcse_mean"] or np.inf, ref_m[j])
        own_sd_err = d.get("mcse_sd")
        if own_sd_err is None:  # every walker of every replica as a chain, as diagnose does
            chains = kept_draws[:, :, :, j].transpose(0, 2, 1).reshape(-1, kept_draws.shape[1])
            own_sd_err = float(mcse_sd(chains))
        s_err = np.hypot(own_sd_err, ref_s[j])
        zm = (d["mean"] - target.mean[j]) / m_err
        zs = (d["sd"] - target.sd[j]) / s_err
        if abs(zm) > BIAS_MCSE or abs(zs) > BIAS_MCSE:
            biased = True
            detail.append(f"{name}: mean {zm:+.1f} MCSE, sd {zs:+.1f} MCSE")
        covered.append(bool(abs(d["mean"] - target.mean[j]) <= Z90 * m_err))
    warnings = list(result.get("acceptance_warnings", []))
    return Judgement(
        ok=bool(verdict["ok"]),
        checks=checks,
        warnings=warnings,
        burn_in=int(cut),
        steps_kept=int(result["steps"]),
        biased=biased,
        bias_detail="; ".join(detail),
        covered=covered,
        lines=list(verdict.get("lines", [])),
        stats=_stats(result),
    )
