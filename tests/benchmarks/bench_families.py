"""Benchmark of run families: planning cost and a batched end-to-end run, through real Snakemake.

Planning: ``snakemake -n`` of a workflow with one family of N members (4 replicas each, a
cheap 2-D normal, one data file per member) against the same N runs written out one entry
per run; user CPU of snakemake (``RUSAGE_CHILDREN`` before and after), wall time and the
jobs planned. End to end (``--run``): a family of M members sampled with ``sample_batch``,
whole workflow from nothing: jobs, total CPU (user + sys of snakemake and all its jobs) per
member, wall time.

Usage::

    .venv/bin/python tests/benchmarks/bench_families.py [--sizes 100 1000 10000]
        [--per-run-sizes 100 1000] [--run 200] [--batch 50] [--record]

``--record`` rewrites this script's section of RESULTS.md.
"""

from __future__ import annotations

import argparse
import os
import platform
import re
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import yaml

HERE = Path(__file__).resolve().parent
WORK = HERE / ".work" / "families"
sys.path.insert(0, str(HERE.parents[1]))

from tests.workflow.conftest import SNAKEFILE  # noqa: E402

MODEL = """\
import numpy as np


def load(path):
    return float(open(path).read())


def log_prob(theta, data):
    return -0.5 * np.sum((theta - data) ** 2, axis=1)
"""


def template(replicas: int, steps: int) -> dict[str, Any]:
    """The members' run config (paths relative to config/runs/)."""
    return {
        "model": {
            "log_prob": "../../models/cheap.py:log_prob",
            "data_loader": "../../models/cheap.py:load",
            "vectorized": True,
        },
        "parameters": [
            {"name": "x", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
            {"name": "y", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
        ],
        "sampler": {"walkers": 16, "steps": steps},
        "storage": {"fsync": False},
        "seed": 5,
        "replicas": replicas,
    }


def make(folder: Path, n: int, layout: str, replicas: int, steps: int, batch: int) -> None:
    """Write a workflow of ``n`` objects as a family or as one entry per run."""
    if folder.exists():
        shutil.rmtree(folder)
    for sub in ("workflow", "config/runs", "models", "data"):
        (folder / sub).mkdir(parents=True)
    (folder / "workflow" / "Snakefile").write_text(SNAKEFILE)
    (folder / "models" / "cheap.py").write_text(MODEL)
    tpl = template(replicas, steps)
    (folder / "config" / "runs" / "star.yaml").write_text(yaml.safe_dump(tpl))
    lines = ["name,data_file,x0"]
    runs: dict[str, Any] = {}
    for i in range(n):
        (folder / "data" / f"o{i:05d}.txt").write_text(str(i % 7 - 3.0))
        lines.append(f"o{i:05d},../../data/o{i:05d}.txt,{i % 7 - 3.0}")
        if layout == "per-run":
            run = yaml.safe_load(yaml.safe_dump(tpl))
            run["model"] = {
                "log_prob": "models/cheap.py:log_prob",
                "data_loader": "models/cheap.py:load",
                "vectorized": True,
                "data": f"data/o{i:05d}.txt",
            }
            run["parameters"][0]["init"]["normal"]["loc"] = i % 7 - 3.0
            run["seed"] = 1000 + i
            runs[f"o{i:05d}"] = run
    (folder / "config" / "objects.csv").write_text("\n".join(lines) + "\n")
    if layout == "family":
        runs = {
            "objects": {
                "template": "config/runs/star.yaml",
                "table": "config/objects.csv",
                "key": "name",
                "fill": {"model.data": "data_file", "parameters.0.init.normal.loc": "x0"},
            }
        }
    cfg: dict[str, Any] = {"chainyard": {"runs": runs}}
    if batch > 1:
        cfg["chainyard"]["sample_batch"] = batch
    (folder / "config" / "config.yaml").write_text(yaml.safe_dump(cfg, sort_keys=False))


def timed(folder: Path, *args: str) -> tuple[float, float, float, str]:
    """Run snakemake; (user CPU s, user+sys CPU s, wall s, output) of it and its children."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    res = subprocess.run(
        [sys.executable, "-m", "snakemake", *args], cwd=folder, capture_output=True, text=True
    )
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if res.returncode:
        raise SystemExit(f"snakemake {' '.join(args)} failed:\n{res.stdout}\n{res.stderr}")
    user = after.ru_utime - before.ru_utime
    total = user + after.ru_stime - before.ru_stime
    return user, total, wall, res.stdout + res.stderr


def jobs_of(text: str) -> dict[str, int]:
    """Jobs per rule from snakemake's job stats."""
    counts = {}
    for m in re.finditer(r"^(\S+)\s+(\d+)$", text.split("Job stats:", 1)[-1], re.M):
        counts[m.group(1)] = int(m.group(2))
    return counts


def plan(n: int, layout: str, batch: int) -> dict[str, Any]:
    """Dry-run planning of ``n`` objects (4 replicas)."""
    folder = WORK / f"plan-{layout}-{n}"
    make(folder, n, layout, 4, 200, batch)
    user, _total, wall, out = timed(folder, "-n", "--cores", "2")
    jobs = jobs_of(out)
    row = {"n": n, "layout": layout, "batch": batch, "jobs": jobs.get("total", 0),
           "sampling_jobs": jobs.get("chainyard_sample", 0) + jobs.get("chainyard_sample_batch", 0),
           "user_cpu_s": user, "wall_s": wall}
    print(row, flush=True)
    shutil.rmtree(folder)
    return row


def run(n: int, batch: int, replicas: int, steps: int, layout: str = "family") -> dict[str, Any]:
    """The whole workflow of ``n`` objects from nothing: a family (batched when ``batch`` >
    1) or one entry per run."""
    folder = WORK / f"run-{layout}-{n}"
    make(folder, n, layout, replicas, steps, batch)
    plan_user, _t, _w, dry = timed(folder, "-n", "--cores", "2")
    _user, total, wall, _out = timed(folder, "--cores", "2", "--keep-going")
    name = "objects.o{:05d}" if layout == "family" else "o{:05d}"
    done = sum((folder / "results" / name.format(i) / "summary.csv").is_file() for i in range(n))
    jobs = jobs_of(dry)
    row = {"n": n, "layout": layout, "batch": batch, "replicas": replicas, "steps": steps,
           "jobs": jobs.get("total", 0),
           "sampling_jobs": jobs.get("chainyard_sample_batch", 0) + jobs.get("chainyard_sample", 0),
           "planning_user_cpu_s": plan_user,
           "members_done": done, "cpu_s": total, "cpu_per_member_s": total / n, "wall_s": wall}
    print(row, flush=True)
    return row


def record(plans: list[dict[str, Any]], runs: list[dict[str, Any]]) -> None:
    """Rewrite this benchmark's section of RESULTS.md."""
    lines = [
        "## Run families (`bench_families.py`)",
        "",
        f"{time.strftime('%Y-%m-%d')}, {platform.machine()}, {os.cpu_count()} CPUs "
        "(shared with other jobs), Python " + platform.python_version() + ".",
        "",
        "Planning (`snakemake -n`, 4 replicas per object): user CPU of snakemake.",
        "",
        "| objects | layout | sample_batch | jobs | sampling jobs | planning user CPU (s) "
        "| per object (ms) | wall (s) |",
        "|---|---|---|---|---|---|---|---|",
    ]
    for r in plans:
        lines.append(
            f"| {r['n']:,} | {r['layout']} | {r['batch']} | {r['jobs']:,} | "
            f"{r['sampling_jobs']:,} | {r['user_cpu_s']:.1f} | "
            f"{1000 * r['user_cpu_s'] / r['n']:.1f} | {r['wall_s']:.1f} |"
        )
    if runs:
        lines += ["", "End to end (`--cores 2`, from nothing):", "",
                  "| objects | layout | sample_batch | replicas x steps | jobs | sampling jobs | "
                  "planning user CPU (s) | "
                  "done | CPU total (s) | CPU per object (s) | wall (s) |",
                  "|---|---|---|---|---|---|---|---|---|---|---|"]
        for r in runs:
            lines.append(
                f"| {r['n']} | {r['layout']} | {r['batch']} | {r['replicas']} x {r['steps']} | "
                f"{r['jobs']} | {r['sampling_jobs']} | {r['planning_user_cpu_s']:.1f} | "
                f"{r['members_done']} | {r['cpu_s']:.0f} | "
                f"{r['cpu_per_member_s']:.2f} | {r['wall_s']:.0f} |"
            )
    section = "\n".join(lines) + "\n"
    path = HERE / "RESULTS.md"
    text = path.read_text()
    start = text.find("## Run families (`bench_families.py`)")
    if start >= 0:
        end = text.find("\n## ", start + 1)
        text = text[:start] + section + (text[end + 1 :] if end >= 0 else "")
    else:
        text = text.rstrip("\n") + "\n\n" + section
    path.write_text(text)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="*", default=[100, 1000, 10000])
    ap.add_argument("--per-run-sizes", type=int, nargs="*", default=[100, 1000])
    ap.add_argument("--plan-batch", type=int, default=1, help="sample_batch when planning")
    ap.add_argument("--run", type=int, nargs="*", default=[], help="end-to-end family sizes")
    ap.add_argument("--per-run-run", type=int, nargs="*", default=[],
                    help="end-to-end sizes of the one-entry-per-run layout")
    ap.add_argument("--batch", type=int, default=50)
    ap.add_argument("--replicas", type=int, default=2)
    ap.add_argument("--steps", type=int, default=200)
    ap.add_argument("--record", action="store_true")
    args = ap.parse_args()
    plans = [plan(n, "family", args.plan_batch) for n in args.sizes]
    plans += [plan(n, "per-run", 1) for n in args.per_run_sizes]
    runs = [run(n, args.batch, args.replicas, args.steps) for n in args.run]
    runs += [run(n, 1, args.replicas, args.steps, "per-run") for n in args.per_run_run]
    if args.record:
        record(plans, runs)


if __name__ == "__main__":
    main()
