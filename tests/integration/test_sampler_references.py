"""Metropolis-Hastings, user kernels and accept-reject against outside references.

* Bivariate normal with correlation 0.8 (analytic: means 0, variances 1, E[xy] = 0.8; the
  Gibbs conditionals x | y ~ N(rho y, 1 - rho^2) are textbook, e.g. Gelman et al., Bayesian
  Data Analysis, 3rd ed., section 11.1): MH and a Gibbs kernel within 4 MCSE, with chainyard's
  MCSE for independent chains (Vehtari et al. 2021).
* Detailed balance of the implemented MH acceptance rule on a 1-D grid: the transition matrix
  built from it satisfies pi_i T_ij = pi_j T_ji and pi T = pi (Metropolis et al. 1953;
  Hastings 1970).
* Accept-reject: acceptance rate 1/M for normalised targets within 4 binomial SEs (Robert and
  Casella 2004, section 2.3) and a Kolmogorov-Smirnov test of the draws against the exact
  distribution (scipy.stats, used here as the reference).
* One posteriordb posterior (kidiq, tests/data/posteriordb): ensemble, MH and accept-reject
  agree within 4 combined MCSE, and accept-reject matches posteriordb's exact values.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy import optimize, stats

import chainyard
from chainyard.analysis import diagnose_arrays
from chainyard.diagnostics import integrated_time_report, walkers_as_chains
from chainyard.engine.metropolis import accepts
from chainyard.provenance.inspect import inspect_store
from tests.conftest import cli

RHO = 0.8
BIVARIATE = f"""
import numpy as np

def log_prob(theta, data):
    x, y = theta
    return -0.5 * (x * x - 2 * {RHO} * x * y + y * y) / (1 - {RHO} ** 2)
"""
GIBBS = f"""
import numpy as np

def sweep(state, rng, data):
    s = np.sqrt(1 - {RHO} ** 2)
    x = {RHO} * state[1] + s * rng.standard_normal()
    y = {RHO} * x + s * rng.standard_normal()
    return np.array([x, y])
"""
PARAMS = [
    {"name": "x", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
    {"name": "y", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
]
REFERENCE_FILE = Path(__file__).resolve().parents[1] / "data" / "posteriordb" / "posteriors.json"


def _sample(tmp_path: Path, sampler: dict[str, Any], model: str, params: list, **extra: Any):
    (tmp_path / "model.py").write_text(model)
    (tmp_path / "gibbs.py").write_text(GIBBS)
    cfg = chainyard.parse_config(
        {
            "model": {"log_prob": "model.py:log_prob", **extra.pop("model", {})},
            "parameters": params,
            "sampler": sampler,
            "storage": {"fsync": False},
            "seed": extra.pop("seed", 11),
        },
        base_dir=tmp_path,
    )
    return chainyard.sample(cfg, tmp_path / "s.zarr", progress="off")


def _within_mcse(store: chainyard.Store, kind: str, burn: int) -> list[str]:
    """Means of x, y, x^2, y^2, xy against 0, 0, 1, 1, rho: |error| < 4 MCSE."""
    x = store.draws(start=burn)
    q = np.stack(
        [x[..., 0], x[..., 1], x[..., 0] ** 2, x[..., 1] ** 2, x[..., 0] * x[..., 1]], axis=-1
    )
    res = diagnose_arrays(q[None], names=["x", "y", "xx", "yy", "xy"], kind=kind)
    truth = {"x": 0.0, "y": 0.0, "xx": 1.0, "yy": 1.0, "xy": RHO}
    bad = []
    for name, want in truth.items():
        p = res["params"][name]
        if not abs(p["mean"] - want) < 4 * p["mcse_mean"]:
            bad.append(f"{name}: {p['mean']:.4f} vs {want} (MCSE {p['mcse_mean']:.4f})")
    return bad


def test_metropolis_bivariate_normal(tmp_path: Path) -> None:
    """Adapted MH on the correlated normal: moments within 4 MCSE of the analytic values."""
    sampler = {
        "kind": "metropolis_hastings",
        "chains": 8,
        "steps": 12_000,
        "proposal_sd": 0.5,
        "adapt_steps": 1_000,
    }
    store = _sample(tmp_path, sampler, BIVARIATE, PARAMS)
    assert not _within_mcse(store, "metropolis_hastings", burn=1_000)
    rates = store.accepted(start=1_000).mean(axis=0)
    assert np.all((rates > 0.15) & (rates < 0.4)), rates  # adapted towards 0.234


def test_gibbs_kernel_bivariate_normal(tmp_path: Path) -> None:
    """A Gibbs sweep from the analytic conditionals: moments within 4 MCSE."""
    sampler = {"kind": "kernel", "kernel": "gibbs.py:sweep", "chains": 8, "steps": 4_000}
    store = _sample(tmp_path, sampler, BIVARIATE, PARAMS)
    assert not _within_mcse(store, "kernel", burn=100)
    lp = store.log_prob(start=100)
    x = store.draws(start=100)
    want = -0.5 * (x[..., 0] ** 2 - 2 * RHO * x[..., 0] * x[..., 1] + x[..., 1] ** 2) / (1 - RHO**2)
    assert np.allclose(lp, want, rtol=0, atol=1e-12)  # log-prob computed by chainyard


def test_metropolis_detailed_balance_on_grid() -> None:
    """T built from the implemented acceptance rule on a grid: pi_i T_ij = pi_j T_ji and
    pi T = pi. The rule's acceptance probability for each pair is read off the rule itself:
    the uniform u of the driver is accepted above a threshold, found by bisection to machine
    precision (P = 1 - threshold), then compared with nothing but the balance equations."""
    grid = np.linspace(-4.0, 4.0, 81)
    h = grid[1] - grid[0]
    log_pi = -0.5 * grid**2 + 0.3 * np.sin(3 * grid)  # an arbitrary smooth target
    pi = np.exp(log_pi - log_pi.max())
    pi /= pi.sum()
    sd = 0.7
    diff = log_pi[None, :] - log_pi[:, None]  # log pi_j - log pi_i
    lo, hi = np.zeros_like(diff), np.ones_like(diff)
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        ok = accepts(np.log1p(-mid), diff, 0.0)  # the driver's draw: log of 1 - U
        hi, lo = np.where(ok, mid, hi), np.where(ok, lo, mid)
    p_accept = 1.0 - hi
    step = grid[None, :] - grid[:, None]
    q = np.exp(-0.5 * (step / sd) ** 2) * h / (sd * math.sqrt(2 * math.pi))
    t = q * p_accept
    np.fill_diagonal(t, 0.0)
    t[np.diag_indices_from(t)] = 1.0 - t.sum(axis=1)
    assert np.all(t >= 0)
    flow = pi[:, None] * t
    assert np.allclose(flow, flow.T, rtol=1e-12, atol=0)
    assert np.allclose(pi @ t, pi, rtol=1e-12, atol=0)
    # and the probabilities are min(1, pi_j / pi_i) (Metropolis et al. 1953)
    assert np.allclose(p_accept, np.minimum(1.0, np.exp(diff)), rtol=1e-12, atol=1e-15)


def test_accept_reject_normal_rate_and_ks(tmp_path: Path) -> None:
    """Normalised N(0, 1) under 2 N(0, 2^2) (f/g <= 2 at x = 0): rate 1/2; KS vs scipy."""
    model = (
        "import math\n\ndef log_prob(theta, data):\n"
        "    return -0.5 * float(theta[0]) ** 2 - 0.5 * math.log(2 * math.pi)\n"
    )
    sampler = {
        "kind": "accept_reject",
        "envelope": {"normal": {"loc": 0.0, "scale": 2.0}},
        "log_bound": math.log(2.0),
        "draws": 4_000,
        "chains": 2,
    }
    store = _sample(tmp_path, sampler, model, PARAMS[:1])
    facts = inspect_store(store)["sampler"]["accept_reject"]
    assert abs(facts["rate"] - 0.5) < 4 * facts["se"], facts
    assert stats.kstest(store.draws().ravel(), stats.norm.cdf).pvalue > 1e-3
    assert store.accepted().all()


def test_accept_reject_uniform_envelope_beta(tmp_path: Path) -> None:
    """Beta(2, 2) = 6 x (1 - x) under 1.5 U(0, 1): rate 2/3; KS vs scipy.stats.beta."""
    model = (
        "import math\n\ndef log_prob(theta, data):\n"
        "    x = float(theta[0])\n"
        "    return math.log(6 * x * (1 - x)) if 0 < x < 1 else -math.inf\n"
    )
    sampler = {
        "kind": "accept_reject",
        "envelope": {"uniform": {"low": 0.0, "high": 1.0}},
        "log_bound": math.log(1.5),
        "draws": 3_000,
        "chains": 2,
    }
    params = [{"name": "x", "init": {"uniform": {"low": 0.2, "high": 0.8}}}]
    store = _sample(tmp_path, sampler, model, params)
    facts = inspect_store(store)["sampler"]["accept_reject"]
    assert abs(facts["rate"] - 2 / 3) < 4 * facts["se"], facts
    assert stats.kstest(store.draws().ravel(), stats.beta(2, 2).cdf).pvalue > 1e-3


# ------------------------------------------------------------------ posteriordb: kidiq


def _kidiq() -> dict[str, Any]:
    doc = json.loads(REFERENCE_FILE.read_text())
    return next(p for p in doc["posteriors"] if p["name"] == "kidiq-kidscore_momiq")


KIDIQ_NAMES = ("beta_1", "beta_2", "log_sigma")


def _kidiq_run(tmp_path: Path, sampler: dict[str, Any], seed: int) -> chainyard.Store:
    post = _kidiq()
    (tmp_path / "data.json").write_text(json.dumps(post["data"]))
    unc = post["unconstrained_summaries"]
    params = [
        {"name": n, "init": {"normal": {"loc": unc[k]["mean"], "scale": unc[k]["sd"]}}}
        for n, k in zip(KIDIQ_NAMES, ("beta[1]", "beta[2]", "log_sigma"), strict=True)
    ]
    cfg = chainyard.parse_config(
        {
            "model": {
                "log_prob": "tests.reference_models.kidiq:log_prob",
                "data": "data.json",
                "vectorized": True,
            },
            "parameters": params,
            "sampler": sampler,
            "storage": {"fsync": False},
            "seed": seed,
        },
        base_dir=tmp_path,
    )
    return chainyard.sample(cfg, tmp_path / f"{seed}.zarr", progress="off")


def _kidiq_envelope() -> tuple[list[dict[str, Any]], float]:
    """A product normal envelope (reference means, 2 x reference sds) and log M, the maximum
    of log f - log g found numerically (a margin of 0.05 added; the driver stops the run if
    the bound is ever exceeded)."""
    from tests.reference_models.kidiq import log_prob

    post = _kidiq()
    unc = post["unconstrained_summaries"]
    mean = np.array([unc[k]["mean"] for k in ("beta[1]", "beta[2]", "log_sigma")])
    scale = 2.0 * np.array([unc[k]["sd"] for k in ("beta[1]", "beta[2]", "log_sigma")])
    data = post["data"]

    def neg(z: np.ndarray) -> float:
        x = mean + scale * z
        log_g = float(np.sum(stats.norm.logpdf(x, mean, scale)))
        return -(float(log_prob(x, data)) - log_g)

    best = optimize.minimize(
        neg,
        np.zeros(3),
        method="Nelder-Mead",
        options={"xatol": 1e-8, "fatol": 1e-10, "maxiter": 4000},
    )
    envelope = [
        {"normal": {"loc": float(m), "scale": float(s)}} for m, s in zip(mean, scale, strict=True)
    ]
    return envelope, float(-best.fun) + 0.05


def _mean_mcse(draws: np.ndarray, independent_chains: bool) -> tuple[float, float]:
    """Mean and MCSE of draws (steps, chains): chains as independent chains (Vehtari et al.
    2021, via chainyard's diagnostics), or for an ensemble sd sqrt(tau / n) with tau of the
    walker-averaged ACF (Foreman-Mackey et al. 2013)."""
    if independent_chains:
        res = diagnose_arrays(draws[None, :, :, None], kind="metropolis_hastings")
        return res["params"]["x0"]["mean"], res["params"]["x0"]["mcse_mean"]
    tau = integrated_time_report(walkers_as_chains(draws)).tau
    return float(draws.mean()), float(np.std(draws, ddof=1) * math.sqrt(tau / draws.size))


@pytest.mark.slow
def test_kidiq_ensemble_metropolis_accept_reject_agree(tmp_path: Path) -> None:
    """kidiq (posteriordb): the three samplers' means agree pairwise within 4 combined MCSE;
    accept-reject's means of beta match posteriordb's exact values (OLS, flat prior)."""
    envelope, log_m = _kidiq_envelope()
    ar = _kidiq_run(
        tmp_path,
        {
            "kind": "accept_reject",
            "envelope": envelope,
            "log_bound": log_m,
            "draws": 2_000,
            "chains": 4,
        },
        seed=1,
    )
    mh = _kidiq_run(
        tmp_path,
        {
            "kind": "metropolis_hastings",
            "chains": 8,
            "steps": 40_000,
            "adapt_steps": 4_000,
            "proposal_sd": [1.0, 0.01, 0.03],
        },
        seed=2,
    )
    ens = _kidiq_run(tmp_path, {"walkers": 16, "steps": 6_000}, seed=3)
    runs = {
        "accept_reject": (ar.draws(), True),
        "metropolis_hastings": (mh.draws(start=4_000), True),
        "ensemble": (ens.draws(start=1_000), False),
    }
    summary = {
        kind: [_mean_mcse(d[..., j], indep) for j in range(3)] for kind, (d, indep) in runs.items()
    }
    lines, bad = [], []
    kinds = list(summary)
    for j, name in enumerate(KIDIQ_NAMES):
        for a in range(3):
            for b in range(a + 1, 3):
                (ma, sa), (mb, sb) = summary[kinds[a]][j], summary[kinds[b]][j]
                z = (ma - mb) / math.hypot(sa, sb)
                line = f"{name}: {kinds[a]} {ma:.5g}+-{sa:.2g} vs {kinds[b]} {mb:.5g}+-{sb:.2g}"
                lines.append(line)
                if not abs(z) < 4:
                    bad.append(line)
    assert not bad, "\n".join(lines)
    exact = _kidiq()["exact_values"]["mean_sd"]
    for j, key in enumerate(("beta[1]", "beta[2]")):
        m, s = summary["accept_reject"][j]
        assert abs(m - exact[key][0]) < 4 * s, (key, m, s, exact[key])
    rate = inspect_store(ar)["sampler"]["accept_reject"]["rate"]
    assert rate > 0.005  # the envelope is usable (about 1/M of the normalised target)


def test_diagnose_reference_flags_a_wrong_run(tmp_path: Path) -> None:
    """``diagnose --reference``: an MH run of the same N(0, 1) is consistent with an
    accept-reject reference; an MH run of N(0.3, 1) differs (two-sample KS)."""
    ar_sampler = {
        "kind": "accept_reject",
        "envelope": {"normal": {"loc": 0.0, "scale": 2.0}},
        "log_bound": math.log(2.0),
        "draws": 3_000,
        "chains": 2,
    }
    mh_sampler = {"kind": "metropolis_hastings", "chains": 4, "steps": 3_000, "proposal_sd": 2.4}
    stores = {}
    for name, sampler, loc in (
        ("ref", ar_sampler, 0.0),
        ("same", mh_sampler, 0.0),
        ("shifted", mh_sampler, 0.3),
    ):
        folder = tmp_path / name
        folder.mkdir()
        model = (
            "import math\n\ndef log_prob(theta, data):\n"
            f"    return -0.5 * (float(theta[0]) - {loc}) ** 2 - 0.5 * math.log(2 * math.pi)\n"
        )
        stores[name] = _sample(folder, sampler, model, PARAMS[:1]).path
    for name, differs in (("same", False), ("shifted", True)):
        record = tmp_path / f"{name}.json"
        res = cli(
            "diagnose",
            "--raw",
            str(stores[name]),
            "--reference",
            str(stores["ref"]),
            "--json",
            str(record),
        )
        assert res.returncode == 0, res.stderr
        assert "Compared with reference" in res.stdout
        ref = json.loads(record.read_text())["reference"]
        assert ref["reference_kind"] == "accept_reject"
        assert ref["params"]["x"]["differs"] is differs, ref
