"""Operating characteristics of the verdict over many seeds (run on demand, not by pytest).

    .venv/bin/python tests/benchmarks/bench_verdict.py               # full run, ~1 hour
    .venv/bin/python tests/benchmarks/bench_verdict.py --scale 0.25  # fewer seeds
    .venv/bin/python tests/benchmarks/bench_verdict.py --measure-tau # the taus in runs.TAU

Simulated runs (``tests/statistics/runs.py``: 4 replicas x 32 walkers, stretch move or a
random-walk move, each run with its own seeded generator) are judged as the pipeline judges
a run: the default burn-in policy, then ``diagnose`` with the default targets; a run passes
when ``diagnose --strict`` would exit 0 (``verdict.ok``, all parameters together).

Measured per family and length: the FAIL rate with a 95% Wilson interval (Wilson 1927, JASA
22(158), 209-212), which checks fired, how many runs have a mean or sd more than 4 MCSE off
the reference (run MCSE and reference MCSE combined) and how many of those were judged ok,
acceptance warnings, and the coverage of the 90% MCSE interval of the mean (healthy runs).

Goals (issue 11): FAIL on healthy runs at most 5% at >= 100 steps per tau and at most 20%
at 50; FAIL on wrong runs 100%; never ok for a biased run; coverage near 90%.

Full mode writes its own section of tests/benchmarks/RESULTS.md (between the
``bench_verdict.py`` markers) and every run's outcome to tests/benchmarks/.work/
verdict-study.json; ``--output`` sends the markdown elsewhere.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import subprocess
import sys
import time
from importlib import metadata
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(ROOT))

from tests.statistics.runs import FAMILIES, TAU, simulate, steps_for  # noqa: E402
from tests.statistics.study import Cell, describe, mean_steps_kept, run_cell, wilson  # noqa: E402

MARK_START = "<!-- bench_verdict.py: start -->"
MARK_END = "<!-- bench_verdict.py: end -->"

#: (family, steps, label, seeds at scale 1)
HEALTHY_SEEDS = {"gauss4_corr": 60, "banana": 30, "gamma3": 30}
HEALTHY_LENGTHS = (50, 100, 200)


def plan(scale: float) -> list[tuple[str, int, str, int]]:
    """Every cell of the study with its number of seeds."""

    def n(k: int) -> int:
        return max(2, round(k * scale))

    cells = []
    for target, seeds in HEALTHY_SEEDS.items():
        fam = f"healthy/{target}"
        for k in HEALTHY_LENGTHS:
            cells.append((fam, steps_for(fam, k), f"{k} steps/tau", n(seeds)))
    for steps, seeds in (
        (1000, 10),
        (2000, 10),
        (4000, 10),
        (8000, 10),
        (16000, 8),
        (32000, 6),
        (64000, 4),
    ):
        cells.append(("eight_schools", steps, f"{steps:,} steps", n(seeds)))
    for steps in (2000, 8000):
        cells.append(("bimodal", steps, f"{steps:,} steps", n(20)))
    g = "healthy/gauss4_corr"
    for k in (100, 200):
        cells.append(("stuck_walker", steps_for(g, k), f"{k} steps/tau", n(20)))
        cells.append(("small_step", steps_for(g, k), f"{k} steps/tau of the stretch move", n(20)))
    for k in (5, 10, 20, 50):
        cells.append(("far_start", steps_for(g, k), f"{k} steps/tau", n(20)))
    return cells


def goal(cell: Cell) -> tuple[str, bool | None]:
    """The issue's goal for a cell and whether it is met (None: no goal)."""
    rate = cell.failed / max(cell.n, 1)
    if cell.family.startswith("healthy/"):
        k = int(cell.label.split()[0])
        limit = 0.05 if k >= 100 else 0.20
        return f"FAIL <= {limit:.0%}", rate <= limit
    met = cell.failed == cell.n and not cell.biased_ok
    return "FAIL 100%, no biased ok", met


def machine() -> list[str]:
    """Rows describing the machine and software."""

    def git(*args: str) -> str:
        try:
            return subprocess.run(
                ["git", *args], cwd=ROOT, capture_output=True, text=True, check=False
            ).stdout.strip()
        except OSError:
            return "?"

    head = git("rev-parse", "--short", "HEAD")
    dirty = git("status", "--porcelain", "--", "plugin/chainyard")
    cpu = "?"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    import chainyard

    return [
        f"| nproc | {os.cpu_count()} |",
        f"| CPU | {cpu} |",
        f"| OS | {platform.platform()} |",
        f"| Python | {platform.python_version()} |",
        f"| numpy / emcee | {np.__version__} / {metadata.version('emcee')} |",
        f"| chainyard | imported from {Path(chainyard.__file__).parent}; git {head}"
        f"{' (plugin/ has uncommitted changes)' if dirty else ' (clean)'} |",
        "| load average at start (1, 5, 15 min) | "
        + ", ".join(f"{x:.2f}" for x in os.getloadavg())
        + " |",
    ]


def markdown(cells: list[Cell], started: str, seconds: float, scale: float, rows: list[str]) -> str:
    """The RESULTS.md section."""
    out = [
        "## Verdict: operating characteristics",
        "",
        f"Measured {started} with `python tests/benchmarks/bench_verdict.py"
        f"{'' if scale == 1 else f' --scale {scale:g}'}`, wall time {seconds / 60:.1f} min. "
        "Runs: 4 replicas x 32 walkers, simulated by `tests/statistics/runs.py` (each run "
        "seeded with `default_rng([family code, steps, seed])`, seeds 0..n-1); judged with the "
        "default burn-in policy and `diagnose` with the default targets, as `diagnose "
        "--strict` decides (all parameters together). Intervals: 95% Wilson score (Wilson "
        "1927, JASA 22(158)). 'biased': mean or sd more than 4 MCSE (run and reference "
        "combined) off the reference. tau per healthy target (steps, slowest parameter, "
        "measured once with long runs): " + ", ".join(f"{k} {v:g}" for k, v in TAU.items()) + ".",
        "",
        "### Machine",
        "",
        "|  |  |",
        "|---|---|",
        *rows,
        "",
        "### Results",
        "",
        "| family | length | mean steps kept | runs | FAIL | rate [95% CI] | goal | met | "
        "biased | biased but ok | checks fired (runs) | acceptance warnings | 90% MCSE coverage |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for c in cells:
        lo, hi = wilson(c.failed, c.n)
        g, met = goal(c)
        cov, tot = c.coverage()
        checks = ", ".join(f"{k} {v}" for k, v in c.checks().most_common()) or "-"
        cover = f"{cov}/{tot} = {cov / tot:.1%}" if tot and c.family.startswith("healthy") else "-"
        out.append(
            f"| {c.family} | {c.label} ({c.steps:,} steps) | {mean_steps_kept(c):,.0f} | {c.n} "
            f"| {c.failed} | {c.failed / max(c.n, 1):.0%} [{lo:.0%}, {hi:.0%}] | {g} | "
            f"{'yes' if met else '**no**'} | {c.biased} | {len(c.biased_ok)} | {checks} | "
            f"{c.warned()} | {cover} |"
        )
    healthy = [c for c in cells if c.family.startswith("healthy/")]
    cov = sum(c.coverage()[0] for c in healthy)
    tot = sum(c.coverage()[1] for c in healthy)
    if tot:
        lo, hi = wilson(cov, tot)
        out += [
            "",
            f"90% MCSE interval coverage over all healthy runs and parameters: {cov}/{tot} = "
            f"{cov / tot:.1%} [{lo:.1%}, {hi:.1%}] (goal: near 90%).",
        ]
    out += ["", "### Families", ""]
    out += [f"- **{k}**: {f.what}." for k, f in FAMILIES.items()]
    out += ["", "### Examples (seed: reasons)", ""]
    for c in cells:
        wrong = c.examples(ok=c.family.startswith("healthy/") is False, k=2)
        label = "judged ok" if not c.family.startswith("healthy/") else "judged FAIL"
        if c.family.startswith("healthy/"):
            wrong = c.examples(ok=False, k=2)
        if wrong:
            out.append(f"- {c.family}, {c.label}, {label}: " + " | ".join(wrong))
        for s in c.biased_ok[:3]:
            r = c.runs[c.seeds.index(s)]
            out.append(f"- {c.family}, {c.label}: seed {s} biased but ok ({r.bias_detail})")
    out.append("")
    return "\n".join(out)


def write_section(path: Path, text: str) -> None:
    """Replace this script's section of ``path`` (or append it)."""
    block = f"{MARK_START}\n{text}{MARK_END}\n"
    current = path.read_text() if path.exists() else ""
    if MARK_START in current and MARK_END in current:
        a = current.index(MARK_START)
        b = current.index(MARK_END) + len(MARK_END) + 1
        current = current[:a] + block + current[b:]
    else:
        current = current.rstrip("\n") + "\n\n" + block
    path.write_text(current)


def measure_tau() -> None:
    """Integrated autocorrelation time of each healthy target (emcee's estimator)."""
    import emcee

    for fam in (f for f in FAMILIES if f.startswith("healthy/")):
        runs = simulate(fam, 20_000, range(4))
        taus = np.array(
            [
                emcee.autocorr.integrated_time(runs.draws[i, k], quiet=True)
                for i in range(4)
                for k in range(4)
            ]
        )
        print(fam, "tau per parameter", taus.mean(0).round(1), "sd", taus.std(0).round(1))


def main() -> None:
    """Command line."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--scale", type=float, default=1.0, help="multiply every seed count")
    ap.add_argument("--only", default="", help="comma-separated family prefixes to run")
    ap.add_argument("--output", type=Path, default=None, help="markdown file for the section")
    ap.add_argument("--json", type=Path, default=HERE / ".work" / "verdict-study.json")
    ap.add_argument("--measure-tau", action="store_true", help="print the healthy targets' tau")
    args = ap.parse_args()
    if args.measure_tau:
        measure_tau()
        return
    started = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    rows = machine()
    t0 = time.perf_counter()
    cells = []
    only = [p for p in args.only.split(",") if p]
    for family, steps, label, n in plan(args.scale):
        if only and not any(family.startswith(p) for p in only):
            continue
        cell = run_cell(family, steps, range(n), label)
        cells.append(cell)
        print(describe(cell), flush=True)
    seconds = time.perf_counter() - t0
    text = markdown(cells, started, seconds, args.scale, rows)
    output = args.output or (HERE / "RESULTS.md")
    write_section(output, text)
    args.json.parent.mkdir(parents=True, exist_ok=True)
    args.json.write_text(
        json.dumps(
            [
                {
                    "family": c.family,
                    "steps": c.steps,
                    "label": c.label,
                    "runs": [
                        {
                            "seed": s,
                            "ok": r.ok,
                            "checks": sorted(r.checks),
                            "biased": r.biased,
                            "bias": r.bias_detail,
                            "burn_in": r.burn_in,
                            "kept": r.steps_kept,
                            "warnings": r.warnings[:3],
                            "lines": r.lines[:12],
                            "stats": r.stats,
                        }
                        for s, r in zip(c.seeds, c.runs, strict=True)
                    ],
                }
                for c in cells
            ],
            indent=1,
        )
    )
    print(f"wrote {output} and {args.json} ({seconds / 60:.1f} min)")


if __name__ == "__main__":
    main()
