"""Does following "steps still needed" once make a run pass? (issue 25, items 2-3)

    nice -n 10 .venv/bin/python tests/benchmarks/bench_steps_needed.py [--seeds 20] [--start 20]

Each healthy run (``tests/statistics/runs.py``: 4 replicas x 32 walkers, stretch move,
started at the target) is simulated once, long; judging its first ``n`` steps is exactly
judging a run of ``n`` steps (the runs are prefix-consistent). A run starts at ``--start``
steps per (long-run) tau, is judged (default burn-in, default targets) and, when it fails,
extended by the ``more_steps`` it suggests and judged again. Recorded per run: whether it
passed after that first suggestion, and the suggested length over the shortest passing
length (the first on a grid of lengths growing by 8% from the start that passes).
Results are JSON lines in tests/benchmarks/.work/steps-needed.jsonl.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(ROOT))

from tests.statistics.judge import Judgement, judge  # noqa: E402
from tests.statistics.runs import FAMILIES, TAU, simulate, steps_for  # noqa: E402

GRID = 1.08


def one(family: str, seed: int, start: float, longest: float) -> dict:
    """Simulate one run to ``longest`` steps per tau; follow its first suggestion."""
    fam = FAMILIES[family]
    n0 = steps_for(family, start)
    n_max = steps_for(family, longest)
    runs = simulate(family, n_max, [seed])
    d, lp, acc = runs.draws[0], runs.log_prob[0], runs.accepted[0]

    def at(n: int) -> Judgement:
        return judge(fam.target, d[:, :n], lp[:, :n], acc[:, :n], fam.move_kinds)

    first = at(n0)
    more = first.stats.get("more_steps")
    row = {"family": family, "seed": seed, "start_steps": n0, "ok_at_start": first.ok}
    if first.ok or more is None:
        return {**row, "more_steps": more}
    n1 = n0 + int(more)
    if n1 > n_max:
        return {**row, "more_steps": more, "suggested": n1, "error": "beyond simulated"}
    second = at(n1)
    shortest = None
    n = n0
    while n < n_max:
        n = max(n + 1, round(n * GRID))
        if n >= n1 and second.ok:
            shortest = min(n, n1)
            break
        if at(min(n, n_max)).ok:
            shortest = n
            break
    return {
        **row,
        "more_steps": more,
        "suggested": n1,
        "ok_after": second.ok,
        "checks_after": sorted(second.checks),
        "shortest_passing": shortest,
        "overshoot": None if shortest is None else n1 / shortest,
        "spt_after": second.stats.get("steps_per_tau"),
        "growth_after": second.stats.get("tau_growth"),
        "true_spt_suggested": n1 / TAU[family.split("/")[1]],
    }


def main() -> None:
    """Command line."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", type=int, default=20)
    ap.add_argument("--start", type=float, default=20.0, help="steps per tau at the start")
    ap.add_argument("--longest", type=float, default=200.0, help="steps per tau simulated")
    ap.add_argument("--families", default="gauss4_corr,gamma3,banana")
    args = ap.parse_args()
    out = HERE / ".work" / "steps-needed.jsonl"
    out.parent.mkdir(exist_ok=True)
    for t in args.families.split(","):
        for s in range(args.seeds):
            t0 = time.perf_counter()
            row = one(f"healthy/{t}", s, args.start, args.longest)
            row["start_per_tau"] = args.start
            row["seconds"] = round(time.perf_counter() - t0, 1)
            with out.open("a") as fh:
                fh.write(json.dumps(row) + "\n")
            print(json.dumps(row), flush=True)


if __name__ == "__main__":
    main()
