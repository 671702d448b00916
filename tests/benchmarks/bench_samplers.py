"""Speed of the samplers beyond the ensemble against plain numpy doing the same (on demand).

    .venv/bin/python tests/benchmarks/bench_samplers.py            # about 2 minutes
    .venv/bin/python tests/benchmarks/bench_samplers.py --quick    # smoke run

1. Metropolis-Hastings: ``chainyard.sample`` (store, commits, fsync) vs a plain numpy loop
   that draws from the same per-chain generators (in the same blocks), evaluates the same
   vectorised model once per step for all chains and applies the same acceptance rule. Both
   start from the same state; the loop's last state is checked to equal the store's last row
   bit for bit, so the two do the same work. Steps per second per chain; overhead =
   chainyard time / loop time - 1 (target <= 10%). A third column steps chainyard's driver
   without a store (guarded model calls included), which splits the overhead into the
   store's part and the driver's and model guard's part.
2. A user kernel (an autoregressive Gibbs-like update per chain; chainyard evaluates the
   log-probability of the new states): the same comparison.
3. Accept-reject: draws per second vs a plain vectorised numpy accept-reject (one big batch
   of proposals, one model call, ``x[accept]``), which does not keep per-chain streams, exact
   resume or proposal counts; reported as a ratio, no target.

Every configuration is run once per round, rounds repeated with the order rotated, medians
reported with their min-max spread. Full mode appends/replaces the section "Samplers beyond
the ensemble" in tests/benchmarks/RESULTS.md.
"""

from __future__ import annotations

import argparse
import datetime as dt
import math
import platform
import shutil
import statistics
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

import chainyard
from chainyard.engine.chains import chain_generators
from chainyard.engine.initial import initial_state
from chainyard.engine.metropolis import block_steps
from chainyard.model import load_model

HERE = Path(__file__).resolve().parent
DIM = 10
CHAINS = 4
SEED = 8
MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * np.einsum("ij,ij->i", theta, theta)
"""
KERNEL = """
import numpy as np

def step(state, rng, data):
    return 0.5 * state + 0.8660254037844386 * rng.standard_normal(state.shape)
"""
SECTION = "## Samplers beyond the ensemble"


def _config(folder: Path, sampler: dict, storage: dict | None = None) -> chainyard.RunConfig:
    (folder / "model.py").write_text(MODEL)
    (folder / "kernel.py").write_text(KERNEL)
    params = [{"name": f"x{j}", "init": {"normal": {"loc": 0.0, "scale": 1.0}}} for j in range(DIM)]
    return chainyard.parse_config(
        {
            "model": {"log_prob": "model.py:log_prob", "vectorized": True},
            "parameters": params,
            "sampler": sampler,
            "storage": storage or {},
            "seed": SEED,
        },
        base_dir=folder,
    )


def _chainyard(folder: Path, config: chainyard.RunConfig) -> tuple[float, np.ndarray]:
    out = folder / "s.zarr"
    shutil.rmtree(out, ignore_errors=True)
    t = time.perf_counter()
    store = chainyard.sample(config, out, progress="off")
    took = time.perf_counter() - t
    last = store.read_rows("position", store.steps_done - 1, store.steps_done)[0]
    return took, last


def _plain_metropolis(config: chainyard.RunConfig, steps: int) -> tuple[float, np.ndarray]:
    """The same random walk in plain numpy: per-chain streams read in the same blocks."""
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
                z[c] = g.standard_normal((size, DIM))
                log_u[c] = np.log1p(-g.random(size))
        prop = x + sd * z[:, i]
        new = func(prop, None)
        ok = log_u[:, i] < new - lp
        np.copyto(x, prop, where=ok[:, None])
        np.copyto(lp, new, where=ok)
    return time.perf_counter() - t, x.copy()


def _plain_kernel(config: chainyard.RunConfig, steps: int) -> tuple[float, np.ndarray]:
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


def _driver_only(config: chainyard.RunConfig, steps: int) -> tuple[float, np.ndarray]:
    """chainyard's own driver stepped with its guarded model, nothing stored."""
    from chainyard.engine.drivers import initial_random_state, make_driver

    model = load_model(config)
    x, lp, blobs, _ = initial_state(config, model, 0)
    driver = make_driver(config, model, x, lp, blobs, initial_random_state(config, 0), step=0)
    t = time.perf_counter()
    last = None
    for rows in driver.steps(steps):
        last = rows
    assert last is not None
    return time.perf_counter() - t, last.position.copy()


def _plain_accept_reject(draws: int, log_m: float) -> float:
    """Vectorised accept-reject of N(0, I) under N(0, 2^2 I): batches until ``draws``."""
    rng = np.random.default_rng(SEED)
    got = 0
    t = time.perf_counter()
    while got < draws:
        n = 4096
        x = 2.0 * rng.standard_normal((n, DIM))
        log_f = -0.5 * np.einsum("ij,ij->i", x, x)
        log_g = np.sum(-0.125 * x * x - math.log(2.0) - 0.5 * math.log(2 * math.pi), axis=1)
        keep = x[np.log1p(-rng.random(n)) < log_f - log_m - log_g]
        got += len(keep)
    return time.perf_counter() - t


def _spread(values: list[float]) -> str:
    return f"{statistics.median(values):.3g} ({min(values):.3g}-{max(values):.3g})"


def _per_step(short: list[float], long: list[float], extra: int) -> list[float]:
    """Marginal seconds per step: (long run - short run) / extra steps, per round."""
    return [(b - a) / extra for a, b in zip(short, long, strict=True)]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--rounds", type=int, default=None)
    args = ap.parse_args()
    rounds = args.rounds or (2 if args.quick else 3)
    short, long = (2_000, 12_000) if args.quick else (20_000, 220_000)
    ar_draws = 1_000 if args.quick else 5_000
    # log f - log g for f = exp(-|x|^2/2), g = N(0, 4 I): max DIM (log 2 + log(2 pi)/2) at 0
    log_m = DIM * (math.log(2.0) + 0.5 * math.log(2 * math.pi))
    folder = Path(tempfile.mkdtemp(prefix="chainyard-bench-samplers-"))
    try:
        samplers = {
            "metropolis_hastings": (
                {"kind": "metropolis_hastings", "chains": CHAINS, "proposal_sd": 0.7},
                _plain_metropolis,
            ),
            "kernel": (
                {"kind": "kernel", "kernel": "kernel.py:step", "chains": CHAINS},
                _plain_kernel,
            ),
        }
        ar = _config(
            folder,
            {
                "kind": "accept_reject",
                "envelope": [{"normal": {"loc": 0.0, "scale": 2.0}}] * DIM,
                "log_bound": log_m,
                "draws": ar_draws,
                "chains": CHAINS,
            },
        )
        jobs: dict[str, Callable[[], float]] = {}
        same: dict[str, bool] = {}

        def add(name: str, sampler: dict, plain: Callable, storage: dict | None = None) -> None:
            for n in (short, long):
                config = _config(folder, {**sampler, "steps": n}, storage)

                def ours(config: chainyard.RunConfig = config, n: int = n) -> float:
                    took, last = _chainyard(folder, config)
                    if n == long and name not in same:  # once: the loop makes the same draws
                        same[name] = bool(np.array_equal(last, plain(config, n)[1]))
                    return took

                jobs[f"{name} chainyard {n}"] = ours
                jobs[f"{name} plain {n}"] = lambda c=config, n=n: plain(c, n)[0]
                jobs[f"{name} driver {n}"] = lambda c=config, n=n: _driver_only(c, n)[0]

        for name, (sampler, plain) in samplers.items():
            add(name, sampler, plain)
        # the same MH runs committing every 50,000 steps instead of 2,000 (cheap steps)
        sparse = "metropolis_hastings, commits every 50,000 steps"
        samplers[sparse] = samplers["metropolis_hastings"]
        add(sparse, *samplers[sparse], {"commit_every_steps": 50_000})
        jobs["accept_reject chainyard"] = lambda: _chainyard(folder, ar)[0]
        jobs["accept_reject plain"] = lambda: _plain_accept_reject(ar_draws * CHAINS, log_m)
        times: dict[str, list[float]] = {k: [] for k in jobs}
        names = list(jobs)
        for r in range(rounds):
            for k in names[r % len(names) :] + names[: r % len(names)]:
                times[k].append(jobs[k]())
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    extra = long - short
    lines = [
        SECTION,
        "",
        f"`bench_samplers.py`, {dt.datetime.now(dt.UTC):%Y-%m-%d %H:%M} UTC, "
        f"{platform.platform()}, Python {platform.python_version()}, numpy {np.__version__}; "
        f"{rounds} rounds (medians, min-max); {DIM}-D standard normal, vectorised model, "
        f"{CHAINS} chains. Steps/s are marginal rates, from runs of {short:,} and {long:,} "
        "steps: (long - short) / extra steps, so fixed start-up costs (store creation, "
        "model import, commit helper start) are separated out; chainyard's runs use the "
        "default storage (commits every 2,000 steps or 30 s, fsync on). Start-up = the short "
        "run's time minus its steps at the marginal rate. Machine shared with other jobs.",
        "",
        "| sampler | chainyard steps/s per chain | driver only (no store) | plain numpy | "
        "overhead vs plain | of which the store | chainyard start-up | same draws |",
        "|---|---|---|---|---|---|---|---|",
    ]
    for name in samplers:
        per = {
            k: _per_step(times[f"{name} {k} {short}"], times[f"{name} {k} {long}"], extra)
            for k in ("chainyard", "driver", "plain")
        }
        med = {k: statistics.median(v) for k, v in per.items()}
        startup = statistics.median(times[f"{name} chainyard {short}"]) - short * med["chainyard"]
        lines.append(
            f"| {name} | {_spread([1 / v for v in per['chainyard']])} | "
            f"{_spread([1 / v for v in per['driver']])} | "
            f"{_spread([1 / v for v in per['plain']])} | "
            f"{med['chainyard'] / med['plain'] - 1:+.0%} (target <= +10%) | "
            f"{med['chainyard'] / med['driver'] - 1:+.0%} | {startup:.2f} s | "
            f"{same.get(name)} |"
        )
    ours = [ar_draws * CHAINS / t for t in times["accept_reject chainyard"]]
    plain_ar = [ar_draws * CHAINS / t for t in times["accept_reject plain"]]
    lines += [
        "",
        f"Accept-reject, {DIM}-D, M = 2^{DIM} (about 1,024 proposals per draw), "
        f"{ar_draws:,} draws per chain, whole run (start-up included):",
        "",
        "| accept-reject | draws/s (all chains) |",
        "|---|---|",
        f"| chainyard (blocks of 1,024 per chain, per-chain streams, stored) | {_spread(ours)} |",
        f"| plain vectorised numpy (one stream, batches of 4,096, nothing stored) | "
        f"{_spread(plain_ar)} |",
        f"| ratio plain / chainyard | "
        f"{statistics.median(plain_ar) / statistics.median(ours):.2g} |",
        "",
    ]
    text = "\n".join(lines)
    print(text)
    if args.quick:
        return
    results = HERE / "RESULTS.md"
    old = results.read_text()
    if SECTION in old:
        head, _, rest = old.partition(SECTION)
        tail = rest.split("\n## ", 1)
        old = head + (("## " + tail[1]) if len(tail) > 1 else "")
    results.write_text(old.rstrip("\n") + "\n\n" + text)


if __name__ == "__main__":
    main()
