"""Candidate second signals for biased funnel runs, measured against healthy runs.

    nice -n 10 .venv/bin/python tests/benchmarks/bench_funnel_signals.py --part es16
    (parts: es16, es64, healthy, all; results as JSON lines in tests/benchmarks/.work/)
    --rejudge DIR judges every run saved in DIR with the current verdict (JSON lines in
    .work/funnel-verdict.jsonl); --table prints the markdown table of those lines.
    --save DIR also writes each run's arrays (draws, log_prob, accepted as .npy, float64 and
    bool, no pickle) to DIR/FAMILY-STEPS-SEED/, so that new statistics can be computed on the
    same runs later without simulating them again (64,000 steps: 655 MB per run)

For every simulated run (``tests/statistics/runs.py``, 4 replicas x 32 walkers, stretch move,
judged with the default burn-in as ``tests/statistics/judge.py`` does) and every parameter,
on the draws kept after burn-in:

* ``tail_nrhat``: nested R-hat (Margossian et al. 2024) of the tail indicators
  ``I(x <= q05)`` and ``I(x >= q95)`` (pooled quantiles), replicas as superchains: do the
  replicas (and the halves of each walker) visit the tails in the same shares? (the local
  R-hat idea of Vehtari et al. 2021, section 4, on tail quantiles);
* ``tail_rhat``: split R-hat of each replica's walker-mean tail-indicator trace;
* ``tau_trend``: tau of the second half / tau of the first half (walkers averaged, mean over
  replicas): does the autocorrelation time keep growing over the run?
* ``rank_growth``: the verdict's tau growth on rank-normalised draws (Vehtari et al. 2021,
  eq. 14), robust to heavy tails.

The extreme over parameters is kept per run (max), with the verdict, its checks and
whether the run is biased (mean or sd > 4 MCSE off the reference).
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(ROOT))

from chainyard.analysis.decide import decide_burn_in  # noqa: E402
from chainyard.config import DefaultBurnIn  # noqa: E402
from chainyard.diagnostics import integrated_time, rhat  # noqa: E402
from chainyard.diagnostics.nested import nested_rhat_of_scores  # noqa: E402
from tests.statistics.judge import ArrayReplica, Judgement, judge  # noqa: E402
from tests.statistics.runs import FAMILIES, simulate, steps_for  # noqa: E402


def _tau(x: np.ndarray, replicas: int) -> float:
    """Mean over replicas of the walker-averaged tau of (chains, steps) rows."""
    w = x.shape[0] // replicas
    return float(np.mean([integrated_time(x[r * w : (r + 1) * w]) for r in range(replicas)]))


def _normal_scores(x: np.ndarray) -> np.ndarray:
    from scipy.special import ndtri
    from scipy.stats import rankdata

    r = rankdata(x.reshape(-1), method="average").reshape(x.shape)
    return ndtri((r - 0.375) / (x.size + 0.25))


def signals(kept: np.ndarray) -> dict[str, float]:
    """Candidate statistics of one run, max over parameters; ``kept`` (R, S, W, d)."""
    n_rep, steps, walkers, d = kept.shape
    out = {"tail_nrhat": 0.0, "tail_rhat": 0.0, "tau_trend": 0.0, "rank_growth": 0.0}
    half = steps // 2
    for j in range(d):
        x = np.ascontiguousarray(kept[..., j].transpose(0, 2, 1).reshape(-1, steps))
        q05, q95 = np.quantile(x, (0.05, 0.95))
        for ind in (x <= q05, x >= q95):
            f = ind.astype(np.float64)
            out["tail_nrhat"] = max(out["tail_nrhat"], nested_rhat_of_scores(f, n_rep))
            traces = f.reshape(n_rep, walkers, steps).mean(axis=1)
            out["tail_rhat"] = max(out["tail_rhat"], float(rhat(traces)))
        t1 = _tau(x[:, :half], n_rep)
        t2 = _tau(x[:, steps - half :], n_rep)
        out["tau_trend"] = max(out["tau_trend"], t2 / t1)
        z = _normal_scores(x)
        out["rank_growth"] = max(out["rank_growth"], _tau(z, n_rep) / _tau(z[:, :half], n_rep))
    return out


def _outcome(j: Judgement) -> dict[str, object]:
    """The verdict's outcome of one judged run, as JSON fields."""
    return {"ok": j.ok, "checks": sorted(j.checks), "biased": j.biased, "bias": j.bias_detail}


def _append(path: Path, row: dict[str, object]) -> None:
    """Append ``row`` to the JSON-lines file ``path`` and print it."""
    with path.open("a") as fh:
        fh.write(json.dumps(row) + "\n")
    print(json.dumps(row), flush=True)


def run(family: str, steps: int, seeds: range, path: Path, save: Path | None = None) -> None:
    """Simulate, judge and measure every seed; append one JSON line per run to ``path``."""
    fam = FAMILIES[family]
    tg = fam.target
    for s in seeds:
        t0 = time.perf_counter()
        runs = simulate(family, steps, [s])
        draws, lp, acc = runs.draws[0], runs.log_prob[0], runs.accepted[0]
        if save is not None:
            folder = save / f"{family.replace('/', '_')}-{steps}-{s}"
            folder.mkdir(parents=True, exist_ok=True)
            for name, arr in (("draws", draws), ("log_prob", lp), ("accepted", acc)):
                np.save(folder / f"{name}.npy", arr, allow_pickle=False)
        j = judge(tg, draws, lp, acc, fam.move_kinds)
        full = [ArrayReplica(draws[k], lp[k], acc[k], k, tg.names) for k in range(len(draws))]
        cut = decide_burn_in(full, DefaultBurnIn(policy="default")).steps_discarded  # type: ignore[arg-type]
        sig = signals(draws[:, cut:])
        stats = {k: j.stats.get(k) for k in ("tau_growth", "steps_per_tau", "rhat_nested")}
        row = {"family": family, "steps": steps, "seed": s, **_outcome(j), **stats, **sig}
        _append(path, {**row, "seconds": time.perf_counter() - t0})
        del runs, draws


def rejudge(saved: Path, path: Path) -> None:
    """Judge every run saved by ``--save`` with the current verdict; one JSON line per run
    (runs already in ``path`` are skipped)."""
    done = set()
    if path.exists():
        done = {(r["steps"], r["seed"]) for r in map(json.loads, path.read_text().splitlines())}
    fam = FAMILIES["eight_schools"]
    folders = sorted(
        saved.glob("eight_schools-*-*"), key=lambda f: tuple(map(int, f.name.split("-")[1:]))
    )
    for folder in folders:
        steps, seed = (int(v) for v in folder.name.split("-")[1:])
        if (steps, seed) in done or not (folder / "accepted.npy").exists():
            continue
        t0 = time.perf_counter()
        arrays = [np.load(folder / f"{n}.npy") for n in ("draws", "log_prob", "accepted")]
        j = judge(fam.target, *arrays)
        row = {"steps": steps, "seed": seed, **_outcome(j), **j.stats}
        _append(path, {**row, "seconds": time.perf_counter() - t0})


def table(path: Path) -> None:
    """Markdown: per length, FAIL rate, biased runs and which check caught them."""
    from tests.statistics.study import wilson

    rows = [json.loads(line) for line in path.read_text().splitlines()]
    print(
        "| steps | seeds | runs FAIL [95% Wilson] | biased runs (> 4 MCSE off) | biased "
        "caught | by tail move ratio | by tail R-hat | by tau growth | tail move ratio fired "
        "(all runs) | tail move ratio min / median / max | fired alone |"
    )
    print("|---|---|---|---|---|---|---|---|---|---|---|")
    for steps in sorted({r["steps"] for r in rows}):
        rs = sorted((r for r in rows if r["steps"] == steps), key=lambda r: r["seed"])
        n, fail = len(rs), sum(not r["ok"] for r in rs)
        lo, hi = wilson(fail, n)
        biased = [r for r in rs if r["biased"]]
        by = {
            k: sum(k in r["checks"] for r in biased)
            for k in ("tail_move_ratio", "rhat_tail", "tau_growth")
        }
        ratios = [r["tail_move_ratio"] for r in rs]
        alone = sum(r["checks"] == ["tail_move_ratio"] for r in rs)
        print(
            f"| {steps:,} | {rs[0]['seed']}-{rs[-1]['seed']} | {fail}/{n} = {fail / n:.0%} "
            f"[{lo:.0%}, {hi:.0%}] | {len(biased)} | {sum(not r['ok'] for r in biased)} | "
            f"{by['tail_move_ratio']} | {by['rhat_tail']} | {by['tau_growth']} | "
            f"{sum('tail_move_ratio' in r['checks'] for r in rs)}/{n} | "
            f"{min(ratios):.3f} / {float(np.median(ratios)):.3f} / {max(ratios):.3f} | {alone} |"
        )


PARTS = {
    "es16": [("eight_schools", 16000, 20)],
    "es64": [("eight_schools", 64000, 20)],
    "healthy": [
        (f"healthy/{t}", steps_for(f"healthy/{t}", k), n)
        for k in (50, 100)
        for t, n in (("gauss4_corr", 20), ("gamma3", 20), ("banana", 12))
    ],
}


def main() -> None:
    """Command line."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--part", choices=[*PARTS, "all"], default="all")
    ap.add_argument("--first-seed", type=int, default=0)
    ap.add_argument("--last-seed", type=int, default=None, help="exclusive; default: the part's")
    ap.add_argument("--save", type=Path, default=None, help="also save each run's arrays here")
    ap.add_argument("--rejudge", type=Path, default=None, help="judge the runs saved here")
    ap.add_argument("--table", action="store_true", help="print the re-judged runs' table")
    args = ap.parse_args()
    if args.rejudge or args.table:
        path = HERE / ".work" / "funnel-verdict.jsonl"
        if args.rejudge:
            path.parent.mkdir(exist_ok=True)
            rejudge(args.rejudge, path)
        if args.table:
            table(path)
        return
    parts = list(PARTS) if args.part == "all" else [args.part]
    out = HERE / ".work"
    out.mkdir(exist_ok=True)
    for p in parts:
        for family, steps, n in PARTS[p]:
            last = n if args.last_seed is None else args.last_seed
            seeds = range(args.first_seed, last)
            run(family, steps, seeds, out / f"funnel-signals-{p}.jsonl", args.save)


if __name__ == "__main__":
    main()
