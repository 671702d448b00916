"""Benchmark of the rule library's overhead: many small runs through real Snakemake.

10 runs x 4 replicas x 200 steps of a cheap vectorised model (a 2-D standard normal), the
whole workflow from nothing to the report inputs, in one ``snakemake`` invocation. Measured:

- total CPU time (user + sys) of snakemake and all its children (``RUSAGE_CHILDREN`` of this
  process before and after the run),
- wall time,
- number of jobs (the jobs Snakemake planned, from a dry run),
- bytes stored under the results folder (every file counted once, hard links once): in
  all stores, in the sampled replica stores alone (the one-store reference; their ratio is
  ``store_copies``), and in everything else (records, tables, plots, logs).

Usage::

    .venv/bin/python tests/benchmarks/bench_workflow.py [--runs 10] [--replicas 4]
        [--steps 200] [--cores 2] [--label NAME] [--json OUT.json]

To measure another checkout of the package (e.g. the code before a change), put its
``plugin/`` first on ``PYTHONPATH`` (with ``plugin/chainyard/rules`` linking to its
``rules/``): every Snakemake job inherits the environment.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import yaml

HERE = Path(__file__).resolve().parent
WORK = HERE / ".work" / "workflow"
sys.path.insert(0, str(HERE.parents[1]))

from tests.workflow.conftest import SNAKEFILE  # noqa: E402  # the Snakefile of every test workflow

CHEAP_MODEL = """\
import numpy as np


def log_prob(theta, data):
    return -0.5 * np.sum(theta * theta, axis=1)
"""


def run_config(seed: int, replicas: int, steps: int) -> dict[str, Any]:
    """One cheap run: 16 walkers on a 2-D standard normal."""
    return {
        "model": {"log_prob": "models/cheap.py:log_prob", "vectorized": True},
        "parameters": [
            {"name": "x", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
            {"name": "y", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
        ],
        "sampler": {"walkers": 16, "steps": steps},
        "storage": {"fsync": False},
        "seed": seed,
        "replicas": replicas,
    }


def make_workflow(folder: Path, runs: int, replicas: int, steps: int) -> None:
    """Write the benchmark workflow into an empty ``folder``."""
    if folder.exists():
        shutil.rmtree(folder)
    for sub in ("workflow", "config", "models"):
        (folder / sub).mkdir(parents=True)
    (folder / "workflow" / "Snakefile").write_text(SNAKEFILE)
    (folder / "models" / "cheap.py").write_text(CHEAP_MODEL)
    cfg = {
        "chainyard": {
            "runs": {f"run{i:02d}": run_config(100 + i, replicas, steps) for i in range(runs)}
        }
    }
    (folder / "config" / "config.yaml").write_text(yaml.safe_dump(cfg, sort_keys=False))


def stored_bytes(folder: Path, only_stores: bool = False) -> int:
    """Bytes of all files under ``folder``, each inode counted once (optionally only files
    inside ``*.zarr`` store folders)."""
    seen: set[tuple[int, int]] = set()
    total = 0
    for root, _dirs, files in os.walk(folder):
        if only_stores and ".zarr" not in root:
            continue
        for f in files:
            st = os.lstat(Path(root) / f)
            key = (st.st_dev, st.st_ino)
            if key in seen:
                continue
            seen.add(key)
            total += st.st_size
    return total


def planned_jobs(folder: Path) -> int:
    """Number of jobs a dry run plans."""
    res = subprocess.run(
        [sys.executable, "-m", "snakemake", "-n", "--cores", "1"],
        cwd=folder, capture_output=True, text=True, check=True,
    )
    for line in (res.stdout + res.stderr).splitlines():
        parts = line.split()
        if len(parts) == 2 and parts[0] == "total":
            return int(parts[1])
    raise RuntimeError("no job count in the dry run:\n" + res.stdout + res.stderr)


def measure(runs: int, replicas: int, steps: int, cores: int) -> dict[str, Any]:
    """Run the whole workflow once; CPU, wall, jobs, bytes."""
    folder = WORK
    make_workflow(folder, runs, replicas, steps)
    jobs = planned_jobs(folder)
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    res = subprocess.run(
        [sys.executable, "-m", "snakemake", "--cores", str(cores)],
        cwd=folder, capture_output=True, text=True,
    )
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if res.returncode != 0:
        raise RuntimeError("workflow failed:\n" + res.stdout[-3000:] + res.stderr[-3000:])
    results = folder / "results"
    sampled = sum(
        stored_bytes(p) for p in sorted(results.glob("*/draws/replica-*.zarr"))
    ) or sum(stored_bytes(p) for p in sorted(results.glob("*/.resumable/replica-*.zarr")))
    total = stored_bytes(results)
    stores = stored_bytes(results, only_stores=True)
    return {
        "runs": runs,
        "replicas": replicas,
        "steps": steps,
        "cores": cores,
        "cpu_user_s": round(after.ru_utime - before.ru_utime, 1),
        "cpu_sys_s": round(after.ru_stime - before.ru_stime, 1),
        "cpu_total_s": round(
            (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime), 1
        ),
        "wall_s": round(wall, 1),
        "jobs": jobs,
        "jobs_per_run": round(jobs / runs, 2),
        "bytes_results": total,
        "bytes_all_stores": stores,
        "bytes_sampled_stores": sampled,
        "store_copies": round(stores / sampled, 2) if sampled else None,
        "bytes_other": total - stores,
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=10)
    ap.add_argument("--replicas", type=int, default=4)
    ap.add_argument("--steps", type=int, default=200)
    ap.add_argument("--cores", type=int, default=2)
    ap.add_argument("--label", default="current")
    ap.add_argument("--json", type=Path, default=None, help="append the result to this file")
    args = ap.parse_args()
    result = {"label": args.label, **measure(args.runs, args.replicas, args.steps, args.cores)}
    print(json.dumps(result, indent=2))
    if args.json:
        rows = json.loads(args.json.read_text()) if args.json.exists() else []
        rows.append(result)
        args.json.write_text(json.dumps(rows, indent=2) + "\n")


if __name__ == "__main__":
    main()
