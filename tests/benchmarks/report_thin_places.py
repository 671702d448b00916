"""Write the "Verdict: thin places" section of RESULTS.md from the studies' outputs.

    .venv/bin/python tests/benchmarks/report_thin_places.py --verdict-json A.json [B.json ...]

Reads ``tests/benchmarks/.work/funnel-signals-*.jsonl`` (``bench_funnel_signals.py``),
``.work/steps-needed.jsonl`` (``bench_steps_needed.py``) and the JSON files written by
``bench_verdict.py --json`` given on the command line; prints markdown with Wilson 95%
intervals (Wilson 1927, JASA 22(158)).
"""

from __future__ import annotations

import argparse
import json
import sys
from collections import defaultdict
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parents[1]))

from tests.statistics.study import wilson  # noqa: E402

TAIL_LIMIT = 1.1
GROWTH_LIMIT = 1.3


def rate(k: int, n: int) -> str:
    """'k/n = p% [lo%, hi%]'."""
    lo, hi = wilson(k, n)
    return f"{k}/{n} = {k / max(n, 1):.0%} [{lo:.0%}, {hi:.0%}]"


def signals_table(rows: list[dict]) -> list[str]:
    """Per family and length: each signal's range and how often it fires."""
    cells: dict[tuple[str, int], list[dict]] = defaultdict(list)
    for r in rows:
        cells[(r["family"], r["steps"])].append(r)
    out = [
        "| family | steps | runs | biased | tail R-hat median / max | fires > 1.1 | "
        "tau growth (raw) median / max | fires > 1.3 | tau growth (ranks) median / max | "
        "fires > 1.3 | biased runs caught by tail R-hat | by raw growth |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for (fam, steps), rs in sorted(cells.items()):
        n = len(rs)

        def mm(key: str, rs: list[dict] = rs) -> str:
            v = np.array([r[key] for r in rs])
            return f"{np.median(v):.3f} / {v.max():.3f}"

        def fires(key: str, limit: float, rs: list[dict] = rs) -> int:
            return sum(r[key] > limit for r in rs)

        biased = [r for r in rs if r["biased"]]
        out.append(
            f"| {fam} | {steps:,} | {n} | {len(biased)} | {mm('tail_rhat')} | "
            f"{rate(fires('tail_rhat', TAIL_LIMIT), n)} | {mm('tau_growth')} | "
            f"{rate(fires('tau_growth', GROWTH_LIMIT), n)} | {mm('rank_growth')} | "
            f"{rate(fires('rank_growth', GROWTH_LIMIT), n)} | "
            f"{sum(r['tail_rhat'] > TAIL_LIMIT for r in biased)}/{len(biased)} | "
            f"{sum(r['tau_growth'] > GROWTH_LIMIT for r in biased)}/{len(biased)} |"
        )
    return out


def steps_table(rows: list[dict]) -> list[str]:
    """Pass rate after the first suggestion and the overshoot, per family."""
    fams: dict[str, list[dict]] = defaultdict(list)
    for r in rows:
        fams[r["family"]].append(r)
    out = [
        "| family | start (steps per tau) | runs | failed at start | passed after the first "
        "suggestion | suggested / shortest passing length: median, max | suggested length in "
        "long-run taus: median (range) |",
        "|---|---|---|---|---|---|---|",
    ]
    for fam, rs in sorted(fams.items()):
        failed = [r for r in rs if not r["ok_at_start"] and "ok_after" in r]
        ok = sum(r["ok_after"] for r in failed)
        over = np.array([r["overshoot"] for r in failed if r.get("overshoot")])
        spt = np.array([r["true_spt_suggested"] for r in failed])
        out.append(
            f"| {fam} | {rs[0]['start_per_tau']:g} | {len(rs)} | {len(failed)} | "
            f"{rate(ok, len(failed))} | {np.median(over):.2f}, {over.max():.2f} | "
            f"{np.median(spt):.1f} ({spt.min():.1f}-{spt.max():.1f}) |"
        )
    return out


def verdict_table(items: list[dict]) -> list[str]:
    """FAIL rates of bench_verdict cells (healthy: false alarms)."""
    out = [
        "| family | length | runs | FAIL [95% CI] | checks fired (runs) | biased |",
        "|---|---|---|---|---|---|",
    ]
    for it in items:
        runs = it["runs"]
        fails = [r for r in runs if not r["ok"]]
        checks: dict[str, int] = defaultdict(int)
        for r in fails:
            for c in r["checks"]:
                checks[c] += 1
        shown = ", ".join(f"{k} {v}" for k, v in sorted(checks.items(), key=lambda x: -x[1]))
        out.append(
            f"| {it['family']} | {it['label']} ({it['steps']:,} steps) | {len(runs)} | "
            f"{rate(len(fails), len(runs))} | {shown or '-'} | "
            f"{sum(r['biased'] for r in runs)} |"
        )
    return out


def _lines(path: Path) -> list[dict]:
    return [json.loads(x) for x in path.read_text().splitlines() if x.strip()]


def main() -> None:
    """Command line."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--verdict-json", nargs="*", type=Path, default=[])
    args = ap.parse_args()
    work = HERE / ".work"
    sig = [r for p in sorted(work.glob("funnel-signals-*.jsonl")) for r in _lines(p)]
    steps = _lines(work / "steps-needed.jsonl")
    items = [it for p in args.verdict_json for it in json.loads(p.read_text())]
    print("\n".join(["#### Signals per run", "", *signals_table(sig), ""]))
    print("\n".join(["#### Steps still needed, followed once", "", *steps_table(steps), ""]))
    print("\n".join(["#### False alarms and detection (current verdict)", ""]))
    print("\n".join([*verdict_table(items), ""]))


if __name__ == "__main__":
    main()
