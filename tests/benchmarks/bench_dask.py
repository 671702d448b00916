"""Benchmark of ``sample --workers dask://`` on a 20 ms model (run on demand, not by pytest).

    .venv/bin/python tests/benchmarks/bench_dask.py            # a few minutes; prints a table
    .venv/bin/python tests/benchmarks/bench_dask.py --rounds 1 # smoke run

A CPU-bound model of about 20 ms per call (busy work, no sleeping), 8 walkers, stretch move:
serial, ``--workers 2`` (local processes) and ``--workers dask://`` against a Dask
LocalCluster of 2 process workers (started once, before the rounds; its start-up is not
timed, as a cluster is started once for many runs), side by side in each round, the order
rotated between rounds. Each run is a fresh ``chainyard sample`` process (its start-up is
timed). Medians and min..max of the speed-up against serial over the rounds are printed,
with the draws checked bitwise equal to the serial run's.
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import yaml

import chainyard

HERE = Path(__file__).resolve().parent
CLUSTER = HERE.parent / "integration" / "dask_cluster.py"

MODEL = """
import time
import numpy as np

def log_prob(theta, data):
    t = time.process_time()
    while time.process_time() - t < 0.02:  # about 20 ms of CPU per call
        pass
    return -0.5 * float(np.dot(theta, theta))
"""


def _config(folder: Path, steps: int) -> Path:
    (folder / "model.py").write_text(MODEL)
    config = {
        "model": {"log_prob": "model.py:log_prob"},
        "parameters": [
            {"name": "a", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
            {"name": "b", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
        ],
        "sampler": {"walkers": 8, "steps": steps},
        "seed": 11,
    }
    path = folder / "run.yaml"
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    return path


def _time(config: Path, out: Path, workers: str) -> float:
    t0 = time.perf_counter()
    proc = subprocess.run(
        [sys.executable, "-m", "chainyard.cli", "sample", str(config), "--out", str(out),
         "--workers", workers],
        capture_output=True, text=True,
    )  # fmt: skip
    if proc.returncode:
        raise SystemExit(f"{workers}: {proc.stderr}")
    return time.perf_counter() - t0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--steps", type=int, default=40)
    args = parser.parse_args()
    cluster = subprocess.Popen(
        [sys.executable, str(CLUSTER), "2"], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
        text=True,
    )  # fmt: skip
    assert cluster.stdout is not None
    address = next(line.split()[1] for line in cluster.stdout if line.startswith("ADDRESS"))
    kinds = {"serial": "1", "workers 2": "2", "dask 2 workers": "dask://" + address[6:]}
    times: dict[str, list[float]] = {k: [] for k in kinds}
    try:
        with tempfile.TemporaryDirectory() as tmp:
            config = _config(Path(tmp), args.steps)
            for r in range(args.rounds):
                order = list(kinds)[r % 3 :] + list(kinds)[: r % 3]
                for name in order:
                    out = Path(tmp) / f"{name.replace(' ', '_')}-{r}.zarr"
                    times[name].append(_time(config, out, kinds[name]))
                ref = chainyard.open_store(Path(tmp) / f"serial-{r}.zarr").draws()
                for name in kinds:
                    store = chainyard.open_store(Path(tmp) / f"{name.replace(' ', '_')}-{r}.zarr")
                    assert np.array_equal(store.draws(), ref), name
    finally:
        assert cluster.stdin is not None
        cluster.stdin.close()
        cluster.wait(timeout=60)
    print(f"20 ms model, 8 walkers, {args.steps} steps, {args.rounds} rounds (wall seconds)")
    print("| run | median s | speed-up vs serial, median (min..max) |")
    print("|---|---|---|")
    for name in kinds:
        ups = [s / t for s, t in zip(times["serial"], times[name], strict=True)]
        print(
            f"| {name} | {statistics.median(times[name]):.2f} | "
            f"{statistics.median(ups):.2f}x ({min(ups):.2f}..{max(ups):.2f}) |"
        )


if __name__ == "__main__":
    main()
