"""Benchmark of ``sample --workers`` (run on demand, not by pytest).

    .venv/bin/python tests/benchmarks/bench_pool.py            # about 4 minutes, writes RESULTS.md
    .venv/bin/python tests/benchmarks/bench_pool.py --quick    # smoke run, prints only

1. A model of >= 1 ms per call (busy work: a fixed number of explicit Euler steps of a small
   ODE in pure Python, CPU-bound; no sleeping, so a worker really computes), 32 walkers,
   stretch move: chainyard serial vs 2 workers vs ``auto``, side by side with emcee's own
   ``EnsembleSampler(pool=multiprocessing.Pool(2))`` and serial emcee on the same model, in
   the same rounds. Target: 2 workers >= 1.6x serial (0.8 x workers).
2. The cheap benchmark of RESULTS.md ("Engine": 10-D Gaussian, 32 walkers, vectorised and
   not) with ``workers="auto"`` (cpus 2) vs serial: auto must not slow it down.

Each configuration runs once per round, the order rotated between rounds; medians and
min..max over rounds are reported (ratios within a round). Times include starting the worker
processes (chainyard) and the multiprocessing pool (emcee).
"""

from __future__ import annotations

import argparse
import datetime as dt
import importlib.util
import io
import multiprocessing
import os
import platform
import re
import resource
import statistics
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import emcee
import numpy as np

import chainyard
from chainyard.config import parse_config

HERE = Path(__file__).resolve().parent
SEED = 20240601
WALKERS = 32

#: the expensive model: ``EULER_STEPS`` explicit Euler steps of dx/dt = -x + sin(theta . x)
COSTLY_MODEL = """
import math

EULER_STEPS = {steps}


def log_prob(theta, data):
    a, b = float(theta[0]), float(theta[1])
    x, h = 1.0, 1e-3
    for _ in range(EULER_STEPS):
        x += h * (-x + math.sin(a * x + b))
    return -0.5 * (a * a + b * b) + 1e-9 * x
"""

CHEAP_MODELS = {
    "vectorised": (
        "import numpy as np\n\n\ndef log_prob(theta, data):\n"
        "    return -0.5 * np.sum(theta * theta, axis=1)\n",
        True,
    ),
    "not vectorised": (
        "import numpy as np\n\n\ndef log_prob(theta, data):\n"
        "    return -0.5 * float(np.dot(theta, theta))\n",
        False,
    ),
}


def _config(folder: Path, model: str, vectorized: bool, ndim: int, steps: int) -> object:
    (folder / "model.py").write_text(model)
    cfg = {
        "model": {"log_prob": "model.py:log_prob", "vectorized": vectorized},
        "parameters": [
            {"name": f"p{k}", "init": {"normal": {"loc": 0.0, "scale": 1.0}}} for k in range(ndim)
        ],
        "sampler": {"walkers": WALKERS, "steps": steps},
        "storage": {"fsync": False},
        "seed": SEED,
    }
    return parse_config(cfg, base_dir=folder, source="bench")


def _import(path: Path) -> Callable[..., float]:
    spec = importlib.util.spec_from_file_location("bench_costly_model", path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules["bench_costly_model"] = module  # picklable for multiprocessing.Pool
    spec.loader.exec_module(module)
    return module.log_prob  # type: ignore[no-any-return]


def _emcee_fn(theta: np.ndarray) -> float:
    return sys.modules["bench_costly_model"].log_prob(theta, None)  # type: ignore[no-any-return]


def _calibrate(folder: Path, target_seconds: float) -> int:
    """Euler steps giving about ``target_seconds`` per call on this machine (now)."""
    steps = 2000
    while True:
        path = folder / "calibrate.py"
        path.write_text(COSTLY_MODEL.format(steps=steps))
        spec = importlib.util.spec_from_file_location(f"cal{steps}", path)
        assert spec is not None and spec.loader is not None
        mod = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(mod)
        theta = np.array([0.3, -0.2])
        fn = mod.log_prob
        t = min(_time(lambda fn=fn, theta=theta: fn(theta, None)) for _ in range(20))
        if t >= target_seconds:
            return steps
        steps = int(steps * max(1.2, target_seconds / t * 1.05))


def _time(fn: Callable[[], object]) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def _cpu() -> float:
    """CPU seconds of this process and its reaped children (the workers, once closed)."""
    ch = resource.getrusage(resource.RUSAGE_CHILDREN)
    return time.process_time() + ch.ru_utime + ch.ru_stime


#: CPU seconds of each run, by configuration (this process + its workers)
CPU: dict[str, list[float]] = {}


def _clocked(label: str, fn: Callable[[], object]) -> float:
    """Wall seconds of ``fn()``; its CPU seconds go to ``CPU[label]``."""
    c0 = _cpu()
    wall = _time(fn)
    CPU.setdefault(label, []).append(_cpu() - c0)
    return wall


class Runs:
    def __init__(self, work: Path) -> None:
        self.work = work
        self.n = 0
        self.logs: dict[str, str] = {}

    def chainyard(self, cfg: object, workers: int | str, label: str) -> float:
        self.n += 1
        path = self.work / f"s{self.n}.zarr"
        log = io.StringIO()

        def go() -> None:
            chainyard.sample(cfg, path, progress="off", stream=log, workers=workers, cpus=2)  # type: ignore[arg-type]

        t = _clocked(label, go)
        self.logs[label] = "; ".join(
            ln.split(": ", 1)[1] for ln in log.getvalue().splitlines() if "worker" in ln
        )
        return t


def _emcee_run(model_path: Path, steps: int, pool: bool) -> float:
    rng = np.random.default_rng(SEED)
    p0 = rng.standard_normal((WALKERS, 2))

    def go() -> None:
        if pool:
            with multiprocessing.get_context("fork").Pool(2) as p:
                s = emcee.EnsembleSampler(WALKERS, 2, _emcee_fn, pool=p)
                s.run_mcmc(p0, steps, progress=False)
        else:
            s = emcee.EnsembleSampler(WALKERS, 2, _emcee_fn)
            s.run_mcmc(p0, steps, progress=False)

    return _clocked("emcee pool" if pool else "emcee", go)


def _interleaved_batches(cfg: object, repeats: int) -> dict[str, list[float]]:
    """Seconds per 16-walker batch: serial, chainyard's pool, multiprocessing.Pool.map."""
    from chainyard.engine.executor import WorkerSpec
    from chainyard.engine.pool import WorkerPool
    from chainyard.model import load_model

    model = load_model(cfg)  # type: ignore[arg-type]
    spec = WorkerSpec(cfg.normalised(), str(cfg.base_dir), cfg.source)  # type: ignore[attr-defined]
    pool = WorkerPool(spec, 2, 2, WALKERS, 1000, lambda line: None)
    thetas = np.random.default_rng(SEED).standard_normal((WALKERS // 2, 2))
    out: dict[str, list[float]] = {"serial": [], "chainyard pool": [], "emcee pool": []}
    with multiprocessing.get_context("fork").Pool(2) as mp:
        pool.evaluate(model, thetas)  # starts the workers
        mp.map(_emcee_fn, list(thetas))
        for _ in range(repeats):
            out["serial"].append(_time(lambda: model.evaluate_serial(thetas)))
            out["chainyard pool"].append(_time(lambda: pool.evaluate(model, thetas)))
            out["emcee pool"].append(_time(lambda: mp.map(_emcee_fn, list(thetas))))
    pool.close()
    return out


def _spread(xs: list[float]) -> str:
    return f"{statistics.median(xs):.2f}x ({min(xs):.2f} .. {max(xs):.2f})"


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--rounds", type=int, default=None)
    ap.add_argument("--output", default=str(HERE / "RESULTS.md"))
    args = ap.parse_args()
    rounds = args.rounds or (1 if args.quick else 3)
    costly_steps = 40 if args.quick else 150
    cheap_steps = 2000 if args.quick else 10000
    started = time.monotonic()
    load0 = os.getloadavg()
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        euler = _calibrate(work, 1.1e-3)
        model_text = COSTLY_MODEL.format(steps=euler)
        costly = work / "costly"
        costly.mkdir()
        cfg = _config(costly, model_text, False, 2, costly_steps)
        _import(costly / "model.py")
        fn = sys.modules["bench_costly_model"].log_prob
        theta = np.array([0.3, -0.2])
        per_call = statistics.median(_time(lambda: fn(theta, None)) for _ in range(50))
        runs = Runs(work)
        names = ["chainyard serial", "chainyard 2 workers", "chainyard auto", "emcee", "emcee pool"]
        times: dict[str, list[float]] = {k: [] for k in names}
        for r in range(rounds):
            order = names[r % len(names) :] + names[: r % len(names)]
            for name in order:
                if name.startswith("chainyard"):
                    w: int | str = {"serial": 1, "2 workers": 2, "auto": "auto"}[
                        name.split(" ", 1)[1]
                    ]
                    times[name].append(runs.chainyard(cfg, w, name))
                else:
                    times[name].append(
                        _emcee_run(costly / "model.py", costly_steps, "pool" in name)
                    )
            print(f"round {r + 1}: " + ", ".join(f"{k} {v[-1]:.2f}s" for k, v in times.items()))
        batches = _interleaved_batches(cfg, 40 if args.quick else 150)
        print("batches", {k: round(statistics.median(v) * 1e3, 2) for k, v in batches.items()})
        cheap: dict[str, dict[str, list[float]]] = {}
        for label, (text, vec) in CHEAP_MODELS.items():
            folder = work / label.replace(" ", "_")
            folder.mkdir()
            c = _config(folder, text, vec, 10, cheap_steps)
            cheap[label] = {"serial": [], "auto": []}
            for r in range(rounds + 1):
                order = ["serial", "auto"] if r % 2 == 0 else ["auto", "serial"]
                for k in order:
                    t = runs.chainyard(c, 1 if k == "serial" else "auto", f"cheap {label} {k}")
                    if r:  # the first round warms up caches
                        cheap[label][k].append(t)
            print(label, {k: [round(x, 2) for x in v] for k, v in cheap[label].items()})
    load1 = os.getloadavg()

    def ratios(a: str, b: str) -> list[float]:
        return [x / y for x, y in zip(times[a], times[b], strict=True)]

    speed = ratios("chainyard serial", "chainyard 2 workers")
    speed_auto = ratios("chainyard serial", "chainyard auto")
    speed_emcee = ratios("emcee", "emcee pool")
    vs_emcee_pool = ratios("emcee pool", "chainyard 2 workers")
    cpu_ratio = [
        a / b for a, b in zip(CPU["chainyard 2 workers"], CPU["chainyard serial"], strict=True)
    ]
    lines = [
        "## Worker pool: parallel log-prob inside one run",
        "",
        f"Measured {dt.datetime.now(dt.UTC):%Y-%m-%d %H:%M} UTC with "
        f"`python tests/benchmarks/bench_pool.py{' --quick' if args.quick else ''}`, "
        f"{rounds} rounds, total {(time.monotonic() - started) / 60:.1f} min; "
        f"{os.cpu_count()} CPUs, Python {platform.python_version()}, emcee {emcee.__version__}, "
        f"numpy {np.__version__}. Load average (1 min) {load0[0]:.2f} at start, "
        f"{load1[0]:.2f} at end: **the machine was shared with other jobs and loaded**, so "
        "every ratio is taken within one round and the spread is given.",
        "",
        f"### 1. A model of {per_call * 1e3:.2f} ms per call, {WALKERS} walkers, "
        f"{costly_steps} steps",
        "",
        f"Busy work, not sleeping: {euler:,} explicit Euler steps of a 1-D ODE in pure Python "
        "per call (calibrated at the start of the run to >= 1.1 ms). chainyard runs are "
        "`chainyard.sample(..., workers=W, cpus=2)` on a fresh store (store writes included, "
        "fsync off); emcee runs are `EnsembleSampler(...).run_mcmc` with and without "
        "`pool=multiprocessing.Pool(2)` (pool start included, as chainyard's worker start is).",
        "",
        "| configuration | median wall s | min .. max wall s | median CPU s (all processes) |",
        "|---|---|---|---|",
    ]
    for k, v in times.items():
        lines.append(
            f"| {k} | {statistics.median(v):.2f} | {min(v):.2f} .. {max(v):.2f} | "
            f"{statistics.median(CPU[k]):.2f} |"
        )
    target = "met" if statistics.median(speed) >= 1.6 else "missed"
    lines += [
        "",
        "| ratio (per round) | median (min .. max) | target |",
        "|---|---|---|",
        f"| chainyard 2 workers vs serial | {_spread(speed)} | >= 1.6x: **{target}** |",
        f"| chainyard auto vs serial | {_spread(speed_auto)} | - |",
        f"| emcee pool(2) vs serial emcee | {_spread(speed_emcee)} | (reference) |",
        f"| chainyard 2 workers vs emcee pool(2) | {_spread(vs_emcee_pool)} | (>1: faster) |",
        f"| CPU of chainyard 2 workers / serial (the pool's cost in CPU) | "
        f"{_spread(cpu_ratio)} | (~1: little overhead) |",
        "",
        f'What auto said: "{runs.logs.get("chainyard auto", "")}"',
        "",
        f'### 2. The cheap benchmark with `workers="auto"` ({cheap_steps:,} steps, 10-D '
        "Gaussian, 32 walkers)",
        "",
        "| model | serial median s | auto median s | auto / serial per round (wall) | "
        "auto / serial per round (CPU) | target |",
        "|---|---|---|---|---|---|",
    ]
    for label, d in cheap.items():
        r = [a / s for a, s in zip(d["auto"], d["serial"], strict=True)]
        cpu_a, cpu_s = CPU[f"cheap {label} auto"][1:], CPU[f"cheap {label} serial"][1:]
        rc = [a / s for a, s in zip(cpu_a, cpu_s, strict=True)]
        ok = "met" if min(statistics.median(r), statistics.median(rc)) <= 1.05 else "missed"
        lines.append(
            f"| {label} | {statistics.median(d['serial']):.2f} | "
            f"{statistics.median(d['auto']):.2f} | {_spread(r)} | {_spread(rc)} | no slowdown "
            f"(<= 1.05x in wall or CPU time; noise): **{ok}** |"
        )
    b_serial = statistics.median(batches["serial"])
    b_pool = statistics.median(batches["chainyard pool"])
    b_emcee = statistics.median(batches["emcee pool"])
    lines += [
        "",
        "### 3. One batch at a time, interleaved (less disturbed by the machine's load)",
        "",
        "The half-ensemble batch the stretch move evaluates (16 walkers of the section 1 "
        "model), evaluated in turn serially, by chainyard's pool of 2 workers and by "
        "emcee's way (`multiprocessing.Pool(2).map`, as `EnsembleSampler` calls it), "
        f"{len(batches['serial'])} times each, interleaved so that all three see the same "
        "load. Pools are started before timing.",
        "",
        "| evaluation of one batch | median ms | speed-up vs serial |",
        "|---|---|---|",
        f"| serial (this process) | {b_serial * 1e3:.2f} | 1.00x |",
        f"| chainyard, 2 workers | {b_pool * 1e3:.2f} | {b_serial / b_pool:.2f}x |",
        f"| multiprocessing.Pool(2).map | {b_emcee * 1e3:.2f} | {b_serial / b_emcee:.2f}x |",
    ]
    lines += [
        "",
        f'What auto said (vectorised): "{runs.logs.get("cheap vectorised auto", "")}"',
        "",
    ]
    text = "\n".join(lines)
    print(text)
    if args.quick:
        return
    out = Path(args.output)
    old = out.read_text() if out.exists() else ""
    pattern = re.compile(r"## Worker pool: parallel log-prob.*?(?=\n## (?!#)|\Z)", re.S)
    new = pattern.sub(lambda _: text.rstrip("\n"), old) if pattern.search(old) else None
    if new is None:
        new = old.rstrip("\n") + "\n\n" + text
    out.write_text(new.rstrip("\n") + "\n")


if __name__ == "__main__":
    main()
