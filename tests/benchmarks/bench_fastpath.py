"""Per-step overhead of every sampler kind against a plain numpy loop making the same draws.

    .venv/bin/python tests/benchmarks/bench_fastpath.py              # ~4 minutes, quiet + busy
    .venv/bin/python tests/benchmarks/bench_fastpath.py --quick      # smoke run
    PYTHONPATH=/path/to/other/checkout/plugin .venv/bin/python tests/benchmarks/bench_fastpath.py \\
        --label before                                               # the same on other code

For each kind (10-D standard normal, cheap vectorised log-prob): ``chainyard.sample`` (store,
commits, fsync; default storage) against a plain numpy loop that makes the same draws from
the same generators and stores nothing (the loop's last state is checked to equal the
store's last row bit for bit):

* ensemble: emcee's stretch move, 32 walkers; the loop is the stretch move written in numpy
  with emcee's draw order (and, for scale, emcee's own ``run_mcmc``);
* Metropolis-Hastings: 4 chains, per-chain streams read in the same blocks;
* kernel: an autoregressive Gibbs-like update per chain, 4 chains;
* accept-reject: 4 chains, envelope N(0, 2^2 I), M = 2^10, per-chain blocks of 1,024;
* a model of about 1 ms per call (a busy wait), ensemble of 32 walkers.

Rates are marginal, (long run - short run) / extra steps, so fixed start-up (store creation,
model import, helper start) is left out. Every configuration runs once per round, rounds
rotate the order (interleaved), and medians are given with their min-max. The whole set runs
twice: on the machine as it is ("quiet"), then with a second CPU-bound process beside it
("busy"). ``--json FILE`` keeps the figures; ``--table BEFORE AFTER`` renders two such
files (a ``--label before`` run on the old code, see above, and an ``--label after`` run) as
the section "Fast path" of tests/benchmarks/RESULTS.md and writes it. ``--scale``,
``--rounds`` and ``--only`` shorten a run.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import math
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

import chainyard
from chainyard.engine.chains import chain_generators
from chainyard.engine.drivers import initial_random_state
from chainyard.engine.initial import initial_state
from chainyard.engine.metropolis import block_steps
from chainyard.model import load_model
from chainyard.streams import random_state_from_json

HERE = Path(__file__).resolve().parent
DIM, CHAINS, WALKERS, SEED = 10, 4, 32, 8
LOG_M = DIM * (math.log(2.0) + 0.5 * math.log(2 * math.pi))  # max of log f - log g, at 0
MODEL = """
import time
import numpy as np

def log_prob(theta, data):
    return -0.5 * np.einsum("ij,ij->i", theta, theta)

def slow(theta, data):
    end = time.perf_counter() + 0.001
    while time.perf_counter() < end:
        pass
    return -0.5 * np.einsum("ij,ij->i", theta, theta)
"""
KERNEL = """
import numpy as np

def step(state, rng, data):
    return 0.5 * state + 0.8660254037844386 * rng.standard_normal(state.shape)
"""
SECTION = "## Fast path: per-step overhead against plain numpy"


def _config(folder: Path, sampler: dict[str, Any], func: str = "log_prob") -> Any:
    (folder / "model.py").write_text(MODEL)
    (folder / "kernel.py").write_text(KERNEL)
    params = [{"name": f"x{j}", "init": {"normal": {"loc": 0.0, "scale": 1.0}}} for j in range(DIM)]
    return chainyard.parse_config(
        {
            "model": {"log_prob": f"model.py:{func}", "vectorized": True},
            "parameters": params,
            "sampler": sampler,
            "seed": SEED,
        },
        base_dir=folder,
    )


def _ours(folder: Path, config: Any) -> tuple[float, np.ndarray, float]:
    """Seconds of one ``chainyard.sample``, the last stored row, stored bytes per draw."""
    out = folder / "s.zarr"
    shutil.rmtree(out, ignore_errors=True)
    t = time.perf_counter()
    store = chainyard.sample(config, out, progress="off")
    took = time.perf_counter() - t
    n = store.steps_done
    last = store.read_rows("position", n - 1, n)[0]
    walkers = last.shape[0]
    size = sum(f.stat().st_size for f in (out / "draws").rglob("*") if f.is_file())
    store.close()
    return took, last, size / (n * walkers)


def _plain_stretch(config: Any, steps: int) -> tuple[float, np.ndarray]:
    """emcee's stretch move (a = 2) in numpy, emcee's draws in emcee's order."""
    model = load_model(config)
    x, lp, _, _ = initial_state(config, model, 0)
    rng = np.random.RandomState()
    rng.set_state(random_state_from_json(initial_random_state(config, 0)))
    func, a = model.func, 2.0
    walkers, ndim = x.shape
    all_inds = np.arange(walkers)
    t = time.perf_counter()
    for _ in range(steps):
        rng.random_sample()  # emcee's move choice
        inds = all_inds % 2
        rng.shuffle(inds)
        for split in (0, 1):
            s1 = inds == split
            s, c = x[s1], x[~s1]
            ns, nc = len(s), len(c)
            zz = ((a - 1.0) * rng.rand(ns) + 1) ** 2.0 / a
            f = (ndim - 1.0) * np.log(zz)
            r = rng.randint(nc, size=(ns,))
            q = c[r] - (c[r] - s) * zz[:, None]
            new = func(q, None)
            ok = f + new - lp[s1] > np.log(rng.rand(ns))
            m1 = s1.copy()
            m1[s1] = ok
            x[m1] = q[ok]
            lp[m1] = new[ok]
    return time.perf_counter() - t, x.copy()


def _emcee(config: Any, steps: int) -> tuple[float, np.ndarray]:
    """emcee's own ``run_mcmc`` from the same start and RNG state (in-memory backend)."""
    import emcee

    model = load_model(config)
    x, lp, _, _ = initial_state(config, model, 0)
    sampler = emcee.EnsembleSampler(WALKERS, DIM, model.func, vectorize=True, args=(None,))
    sampler.random_state = random_state_from_json(initial_random_state(config, 0))
    t = time.perf_counter()
    sampler.run_mcmc(emcee.State(x, log_prob=lp), steps, progress=False)
    return time.perf_counter() - t, sampler.get_chain()[-1].copy()


def _plain_metropolis(config: Any, steps: int) -> tuple[float, np.ndarray]:
    """The same random walk: per-chain streams read in the same blocks."""
    model = load_model(config)
    x, lp, _, _ = initial_state(config, model, 0)
    func = model.func
    gens = chain_generators(SEED, 0, CHAINS)
    sd = float(config.sampler.proposal_sd)
    size = block_steps(CHAINS, DIM)
    z = np.empty((CHAINS, size, DIM))
    log_u = np.empty((CHAINS, size))
    t = time.perf_counter()
    for s in range(steps):
        i = s % size
        if i == 0:
            for c, g in enumerate(gens):
                g.standard_normal(out=z[c])
                log_u[c] = np.log1p(-g.random(size))
        prop = x + sd * z[:, i]
        new = func(prop, None)
        ok = log_u[:, i] < new - lp
        np.copyto(x, prop, where=ok[:, None])
        np.copyto(lp, new, where=ok)
    return time.perf_counter() - t, x.copy()


def _plain_kernel(config: Any, steps: int) -> tuple[float, np.ndarray]:
    from chainyard.engine.kernel import load_kernel

    model = load_model(config)
    kernel = load_kernel(config)
    x, _, _, _ = initial_state(config, model, 0)
    gens = chain_generators(SEED, 0, CHAINS)
    func = model.func
    t = time.perf_counter()
    for _ in range(steps):
        for c, g in enumerate(gens):
            x[c] = kernel(x[c].copy(), g, None)
        func(x, None)
    return time.perf_counter() - t, x.copy()


def _plain_accept_reject(config: Any, draws: int) -> tuple[float, np.ndarray]:
    """The same per-chain blocks of 1,024 proposals under N(0, 2^2 I); first hits in order."""
    func = load_model(config).func
    gens = chain_generators(SEED, 0, CHAINS)
    size = 1024
    last = np.empty((CHAINS, DIM))
    log_b = float(np.sum(np.log(np.full(DIM, 2.0))))  # the envelope's own expressions
    half_log_2pi = 0.5 * math.log(2.0 * math.pi)
    t = time.perf_counter()
    for c, g in enumerate(gens):
        got = 0
        while got < draws:
            x = 0.0 + 2.0 * g.standard_normal((size, DIM))
            log_u = np.log1p(-g.random(size))
            lf = func(x, None)
            z = (x - 0.0) / 2.0
            lg = np.sum(-0.5 * z * z, axis=1) - log_b - DIM * half_log_2pi
            hits = np.flatnonzero(log_u < lf - LOG_M - lg)
            take = min(hits.size, draws - got)
            if take:
                last[c] = x[hits[take - 1]]
            got += take
    return time.perf_counter() - t, last


def _spread(values: list[float], fmt: str = ".3g") -> str:
    return f"{statistics.median(values):{fmt}} ({min(values):{fmt}}-{max(values):{fmt}})"


def _busy() -> subprocess.Popen[bytes]:
    """A second CPU-bound process (a Python busy loop), ended by the caller."""
    return subprocess.Popen([sys.executable, "-c", "while True: pass"])


KINDS: dict[str, dict[str, Any]] = {
    "ensemble (stretch, 32 walkers)": {
        "sampler": {"walkers": WALKERS},
        "plain": _plain_stretch,
        "runs": (3_000, 12_000),
    },
    "Metropolis-Hastings (4 chains)": {
        "sampler": {"kind": "metropolis_hastings", "chains": CHAINS, "proposal_sd": 0.7},
        "plain": _plain_metropolis,
        "runs": (10_000, 60_000),
    },
    "kernel (Gibbs-like, 4 chains)": {
        "sampler": {"kind": "kernel", "kernel": "kernel.py:step", "chains": CHAINS},
        "plain": _plain_kernel,
        "runs": (5_000, 30_000),
    },
    "accept-reject (4 chains, M = 2^10)": {
        "sampler": {
            "kind": "accept_reject",
            "envelope": [{"normal": {"loc": 0.0, "scale": 2.0}}] * DIM,
            "log_bound": LOG_M,
            "chains": CHAINS,
        },
        "plain": _plain_accept_reject,
        "runs": (300, 1_500),
        "steps_key": "draws",
    },
    "1 ms model (ensemble, 32 walkers)": {
        "sampler": {"walkers": WALKERS},
        "func": "slow",
        "plain": _plain_stretch,
        "runs": (30, 150),
    },
}


def _measure(folder: Path, rounds: int, scale: float) -> dict[str, dict[str, Any]]:
    """Per kind: marginal wall and sampler-thread CPU seconds per step, per round."""
    jobs: dict[str, Callable[[], object]] = {}
    same: dict[str, bool] = {}
    bpd: dict[str, float] = {}
    for name, spec in KINDS.items():
        key = spec.get("steps_key", "steps")
        runs = [max(2, int(n * scale)) for n in spec["runs"]]
        for n in runs:
            config = _config(folder, {**spec["sampler"], key: n}, spec.get("func", "log_prob"))
            if n == runs[0]:  # untimed: the loop makes the same draws; bytes per draw
                _, last, bpd[name] = _ours(folder, config)
                same[name] = bool(np.array_equal(last, spec["plain"](config, n)[1]))
            jobs[f"{name}|ours|{n}"] = lambda c=config: _ours(folder, c)
            jobs[f"{name}|plain|{n}"] = lambda c=config, n=n, p=spec["plain"]: p(c, n)
            if name.startswith("ensemble"):
                jobs[f"{name}|emcee|{n}"] = lambda c=config, n=n: _emcee(c, n)
    wall: dict[str, list[float]] = {k: [] for k in jobs}
    cpu: dict[str, list[float]] = {k: [] for k in jobs}
    names = list(jobs)
    for r in range(rounds):
        shift = (r * 7) % len(names)
        for k in names[shift:] + names[:shift]:
            t, c = time.perf_counter(), time.thread_time()
            jobs[k]()
            cpu[k].append(time.thread_time() - c)
            wall[k].append(time.perf_counter() - t)
    out: dict[str, dict[str, Any]] = {}
    for name, spec in KINDS.items():
        a, b = (max(2, int(n * scale)) for n in spec["runs"])
        per: dict[str, list[float]] = {}
        for who in ("ours", "plain", "emcee"):
            if f"{name}|{who}|{a}" not in wall:
                continue
            for label, times in (("", wall), ("cpu_", cpu)):
                per[label + who] = [
                    (y - x) / (b - a)
                    for x, y in zip(
                        times[f"{name}|{who}|{a}"], times[f"{name}|{who}|{b}"], strict=True
                    )
                ]
        out[name] = {"per_step": per, "same": same.get(name), "bytes_per_draw": bpd.get(name)}
    return out


def _row(name: str, res: dict[str, Any]) -> dict[str, Any]:
    per = res["per_step"]
    ratio = [o / p for o, p in zip(per["ours"], per["plain"], strict=True)]
    row = {
        "ours": statistics.median(per["ours"]),
        "plain": statistics.median(per["plain"]),
        "ratio": statistics.median(ratio),
        "ratio_min": min(ratio),
        "ratio_max": max(ratio),
        "cpu_ratio": statistics.median(
            [o / p for o, p in zip(per["cpu_ours"], per["cpu_plain"], strict=True)]
        ),
        "same": res["same"],
        "bytes_per_draw": res["bytes_per_draw"],
    }
    if "emcee" in per:
        row["vs_emcee"] = statistics.median(
            [e / o for e, o in zip(per["emcee"], per["ours"], strict=True)]
        )
        row["plain_vs_emcee"] = statistics.median(
            [e / p for e, p in zip(per["emcee"], per["plain"], strict=True)]
        )
    return row


#: per kind: the target as a limit on chainyard time / plain time (None: not slower than before)
TARGETS: dict[str, tuple[float | None, str]] = {
    "ensemble (stretch, 32 walkers)": (1 / 0.8, ">= 0.8x the plain loop's steps/s"),
    "Metropolis-Hastings (4 chains)": (1.25, "overhead <= +25%"),
    "kernel (Gibbs-like, 4 chains)": (1.25, "overhead <= +25%"),
    "accept-reject (4 chains, M = 2^10)": (1.15, "<= 1.15x the plain time"),
    "1 ms model (ensemble, 32 walkers)": (None, "not slower than before"),
}


def render(before: dict[str, Any], after: dict[str, Any]) -> str:
    """The RESULTS.md section from a ``--label before`` and a ``--label after`` run."""

    def cell(row: dict[str, Any]) -> str:
        return f"{row['ratio']:.2f}x ({row['ratio_min']:.2f}-{row['ratio_max']:.2f})"

    lines = [
        SECTION,
        "",
        f"`bench_fastpath.py`, {after['when']}, {after['machine']}; {after['rounds']} rounds "
        f"per run, run lengths x{after.get('scale', 1.0):g}, interleaved (medians, min-max "
        "of the per-round ratios). Figures are chainyard's time per step / the plain numpy "
        "loop's (same draws, checked bit for bit; 1.00x = no overhead), marginal over a short "
        "and a long run. Before = the code before the fast path (commit 31844fe), after = "
        "this branch; each run has its own plain loop. Wall = wall time; CPU = the sampling "
        "thread's CPU time (commit helper excluded), far less disturbed by other jobs. Load "
        f"average at the start: before {before['load_before']:.1f}, after "
        f"{after['load_before']:.1f} on 2 cores. Busy = a second CPU-bound process beside "
        "the benchmark. Verdicts use the CPU ratio (the wall ratios' ranges are too wide).",
        "",
        "| kind | target | before wall | before CPU | after wall | after CPU | verdict (CPU) "
        "| after, busy: wall / CPU | same draws | store B/draw before / after |",
        "|---|---|---|---|---|---|---|---|---|---|",
    ]
    for name, (limit, text) in TARGETS.items():
        b, a = before["quiet"][name], after["quiet"][name]
        busy = after.get("busy", {}).get(name)
        # "not slower": within 5% of before's ratio
        met = a["cpu_ratio"] <= (b["cpu_ratio"] * 1.05 if limit is None else limit)
        extra = ""
        if "vs_emcee" in a:
            extra = f"; wall {a['vs_emcee']:.1f}x emcee's run_mcmc"
        busy_cell = "n/a"
        if busy is not None:
            busy_cell = f"{cell(busy)} / {busy['cpu_ratio']:.2f}x"
        lines.append(
            f"| {name} | {text} | {cell(b)} | {b['cpu_ratio']:.2f}x | {cell(a)} | "
            f"{a['cpu_ratio']:.2f}x | {'met' if met else 'missed'}{extra} | {busy_cell} | "
            f"{a['same']} | {b['bytes_per_draw']:.2f} / {a['bytes_per_draw']:.2f} |"
        )
    return "\n".join(lines) + "\n"


def write_section(text: str) -> None:
    """Replace this benchmark's section of RESULTS.md (up to its hand-written reading)."""
    results = HERE / "RESULTS.md"
    old = results.read_text()
    if SECTION in old:
        head, _, rest = old.partition(SECTION)
        tail = rest.split("\n## ", 1)
        old = head + (("## " + tail[1]) if len(tail) > 1 else "")
    results.write_text(old.rstrip("\n") + "\n\n" + text)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--rounds", type=int, default=None)
    ap.add_argument("--label", default="after")
    ap.add_argument("--scale", type=float, default=None, help="run lengths times this")
    ap.add_argument("--only", default=None, help="only the kinds whose name contains this")
    ap.add_argument("--no-busy", action="store_true", help="skip the pass beside a busy process")
    ap.add_argument("--json", type=Path, default=None, help="write the figures here")
    ap.add_argument(
        "--table",
        nargs=2,
        type=Path,
        metavar=("BEFORE", "AFTER"),
        help="render two --json files as the RESULTS.md section and write it",
    )
    args = ap.parse_args()
    if args.table is not None:
        text = render(*(json.loads(p.read_text()) for p in args.table))
        print(text)
        write_section(text)
        return
    rounds = args.rounds or (1 if args.quick else 5)
    scale = args.scale or (0.1 if args.quick else 1.0)
    if args.only:
        for name in [k for k in KINDS if args.only not in k]:
            del KINDS[name]
    folder = Path(tempfile.mkdtemp(prefix="chainyard-bench-fastpath-"))
    results: dict[str, Any] = {
        "label": args.label,
        "when": f"{dt.datetime.now(dt.UTC):%Y-%m-%d %H:%M} UTC",
        "machine": f"{platform.platform()}, Python {platform.python_version()}, "
        f"numpy {np.__version__}, {os.cpu_count()} CPUs",
        "load_before": os.getloadavg()[0],
        "code": chainyard.__file__,
        "rounds": rounds,
        "scale": scale,
    }
    try:
        for mode in ("quiet",) if args.no_busy else ("quiet", "busy"):
            busy = _busy() if mode == "busy" else None
            try:
                res = _measure(folder, rounds, scale)
            finally:
                if busy is not None:
                    busy.kill()
                    busy.wait()
            results[mode] = {name: _row(name, r) for name, r in res.items()}
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    print(json.dumps(results, indent=1))
    if args.json is not None:
        args.json.write_text(json.dumps(results, indent=1))


if __name__ == "__main__":
    main()
