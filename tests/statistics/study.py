"""Run a family over many seeds, judge every run, and summarise with binomial intervals.

Intervals: Wilson (1927), "Probable inference, the law of succession, and statistical
inference", JASA 22(158), 209-212 (score interval, 95%).
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np

from .judge import Judgement, judge
from .runs import FAMILIES, REPLICAS, simulate

#: bytes of draws simulated at once (runs are batched up to this)
BATCH_BYTES = 400 * 2**20


def wilson(k: int, n: int, z: float = 1.959963984540054) -> tuple[float, float]:
    """Wilson score interval for ``k`` successes in ``n`` trials (95% by default)."""
    if n == 0:
        return 0.0, 1.0
    p = k / n
    den = 1.0 + z * z / n
    centre = (p + z * z / (2 * n)) / den
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / den
    return max(0.0, centre - half), min(1.0, centre + half)


@dataclass
class Cell:
    """All runs of one family at one length."""

    family: str
    steps: int
    label: str
    seeds: list[int] = field(default_factory=list)
    runs: list[Judgement] = field(default_factory=list)
    seconds: float = 0.0

    @property
    def n(self) -> int:
        """Number of runs."""
        return len(self.runs)

    @property
    def failed(self) -> int:
        """Runs the verdict judged FAIL."""
        return sum(not r.ok for r in self.runs)

    @property
    def biased(self) -> int:
        """Runs whose mean or sd is more than 4 MCSE off the reference."""
        return sum(r.biased for r in self.runs)

    @property
    def biased_ok(self) -> list[int]:
        """Seeds of runs judged ok although biased."""
        return [s for s, r in zip(self.seeds, self.runs, strict=True) if r.ok and r.biased]

    def checks(self) -> Counter[str]:
        """How often each check fired (a run may fire several)."""
        c: Counter[str] = Counter()
        for r in self.runs:
            c.update(r.checks)
        return c

    def warned(self) -> int:
        """Runs with acceptance warnings."""
        return sum(bool(r.warnings) for r in self.runs)

    def coverage(self) -> tuple[int, int]:
        """(covered, total) 90% MCSE intervals of the mean over runs and parameters."""
        cov = [c for r in self.runs for c in r.covered]
        return sum(cov), len(cov)

    def examples(self, ok: bool, k: int = 3) -> list[str]:
        """Up to ``k`` runs with the given verdict, as 'seed N: reasons'."""
        out = []
        for s, r in zip(self.seeds, self.runs, strict=True):
            if r.ok == ok:
                why = "; ".join(x for x in r.lines[1:] if "FAIL" in x) or ", ".join(
                    sorted(r.checks)
                )
                out.append(f"seed {s}: burn-in {r.burn_in}, kept {r.steps_kept}: {why[:300]}")
            if len(out) >= k:
                break
        return out


def run_cell(
    family: str,
    steps: int,
    seeds: Sequence[int],
    label: str = "",
    progress: Callable[[str], None] | None = None,
) -> Cell:
    """Simulate and judge ``family`` at ``steps`` for every seed."""
    import time

    fam = FAMILIES[family]
    per_run = REPLICAS * fam.walkers * steps * fam.target.dim * 8
    batch = max(1, min(len(seeds), BATCH_BYTES // per_run))
    cell = Cell(family, steps, label or f"{steps} steps")
    t0 = time.perf_counter()
    for i in range(0, len(seeds), batch):
        chunk = list(seeds[i : i + batch])
        runs = simulate(family, steps, chunk)
        for k, s in enumerate(chunk):
            cell.seeds.append(int(s))
            cell.runs.append(
                judge(
                    fam.target,
                    runs.draws[k],
                    runs.log_prob[k],
                    runs.accepted[k],
                    fam.move_kinds,
                    kind=fam.kind,
                )
            )
        del runs
        if progress:
            progress(f"{family} {cell.label}: {cell.n}/{len(seeds)} runs, {cell.failed} FAIL")
    cell.seconds = time.perf_counter() - t0
    return cell


def describe(cell: Cell) -> str:
    """One text line per cell: rates with intervals, checks, bias, coverage."""
    lo, hi = wilson(cell.failed, cell.n)
    checks = ", ".join(f"{k} {v}" for k, v in cell.checks().most_common())
    cov, tot = cell.coverage()
    text = (
        f"{cell.family:<20} {cell.label:<22} FAIL {cell.failed}/{cell.n} = "
        f"{cell.failed / max(cell.n, 1):.0%} [{lo:.0%}, {hi:.0%}]  biased {cell.biased}"
        f"  biased-but-ok {len(cell.biased_ok)}  warned {cell.warned()}"
        f"  cover90 {cov}/{tot}  checks: {checks or '-'}  ({cell.seconds:.0f} s)"
        f"\n    median/95%: rhat_nested {quantiles(cell, 'rhat_nested')}, rhat "
        f"{quantiles(cell, 'rhat')}, tau_growth {quantiles(cell, 'tau_growth')}; "
        f"median/5%: steps_per_tau {quantiles(cell, 'steps_per_tau', (0.5, 0.05))}, ess_bulk "
        f"{quantiles(cell, 'ess_bulk', (0.5, 0.05))}"
    )
    return text


def quantiles(cell: Cell, key: str, qs: tuple[float, ...] = (0.5, 0.95)) -> str:
    """Quantiles over runs of one per-run statistic (see ``judge.STATS``), as text."""
    v = [r.stats.get(key) for r in cell.runs]
    v = [x for x in v if x is not None]
    if not v:
        return "-"
    return " / ".join(f"{np.quantile(v, q):.4g}" for q in qs)


def mean_steps_kept(cell: Cell) -> float:
    """Average steps after burn-in."""
    return float(np.mean([r.steps_kept for r in cell.runs]))
