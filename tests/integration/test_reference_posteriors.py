"""chainyard's sampling and diagnostics against reference posteriors from posteriordb.

Reference values: ``tests/data/posteriordb/posteriors.json``, a verbatim subset of summaries of
the posteriordb reference posteriors (stan-dev/posteriordb, commit
28f8d3d6e975315f42aa274a8399f21e07a43b30, BSD-3-Clause; see the README and licence beside it).
The densities are implemented in ``tests/reference_models`` from the descriptions stored there.

Each test builds a run config as a dict, samples it with :func:`chainyard.sample`, maps the draws
back to the constrained scale the reference reports, and compares posterior means:

    |m_chainyard - m_ref| < 4 * sqrt(mcse_chainyard^2 + mcse_ref^2)

* ``mcse_ref``: for the posteriordb reference draws, ``ref_sd / sqrt(10_000)``: the reference is
  10 chains x 1,000 draws that posteriordb certifies as approximately independent (|lag-1
  autocorrelation| < 0.05, bulk ESS > 9,200 for every parameter here). For ``exact_values``
  (quadrature / closed form, no MCMC; eight schools and kidiq) ``mcse_ref = 0``; where they
  exist only they are asserted, and the reference-draw comparison is printed beside them.
* ``mcse_chainyard``: see :func:`mean_check`.

Seeds are fixed. ``CHAINYARD_REFPOST_SEED_OFFSET=<int>`` shifts every seed (used to check by
hand that the tests are not flaky; the default 0 is what CI runs).
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
import pytest

import chainyard
from chainyard.diagnostics import (
    IntegratedTimeReport,
    acceptance_report,
    integrated_time_report,
    walkers_as_chains,
)
from tests.reference_models.low_dim_gauss_mix import to_constrained

REFERENCE_FILE = Path(__file__).resolve().parents[1] / "data" / "posteriordb" / "posteriors.json"
SEED_OFFSET = int(os.environ.get("CHAINYARD_REFPOST_SEED_OFFSET", "0"))
WALKERS = 32
#: eight schools, both parameterisations, per replica: same walkers, init, steps and burn-in,
#: so the healthy non-centred run is the control for the flagged centred one
ES_STEPS, ES_BURN = 16_000, 2_000
Z_MAX = 4.0
SD_RTOL = 0.10


def _load_reference() -> dict[str, dict[str, Any]]:
    doc = json.loads(REFERENCE_FILE.read_text())
    return {p["name"]: p for p in doc["posteriors"]}


REF = _load_reference()


def normal(loc: float, scale: float) -> dict[str, Any]:
    """A chainyard ``init`` block: walkers start at loc + scale * N(0, 1)."""
    return {"normal": {"loc": loc, "scale": scale}}


def run_posterior(
    tmp_path: Path,
    posterior: str,
    log_prob: str,
    parameters: list[dict[str, Any]],
    steps: int,
    seed: int,
    replica: int = 0,
) -> chainyard.Store:
    """Write the posterior's data as JSON under ``tmp_path``, build the config, sample."""
    data_file = tmp_path / "data.json"
    if not data_file.exists():
        data_file.write_text(json.dumps(REF[posterior]["data"]))
    cfg = chainyard.parse_config(
        {
            "model": {"log_prob": log_prob, "data": data_file.name, "vectorized": True},
            "parameters": parameters,
            "sampler": {"walkers": WALKERS, "steps": steps},
            "storage": {"fsync": False},
            "seed": seed + SEED_OFFSET,
        },
        base_dir=tmp_path,
    )
    return chainyard.sample(cfg, tmp_path / f"r{replica}.zarr", replica=replica, progress="off")


@dataclass(frozen=True)
class MeanCheck:
    """One comparison of a chainyard posterior mean with a reference value."""

    name: str
    source: str
    mean: float
    sd: float
    mcse: float
    ref_mean: float
    ref_sd: float
    ref_mcse: float
    tau: IntegratedTimeReport
    asserted: bool = True

    @property
    def z(self) -> float:
        return (self.mean - self.ref_mean) / math.hypot(self.mcse, self.ref_mcse)

    def line(self) -> str:
        return (
            f"{self.name}: mean {self.mean:.6g} (MCSE {self.mcse:.2g}) vs {self.ref_mean:.6g} "
            f"(MCSE {self.ref_mcse:.2g}) [{self.source}]: z = {self.z:+.2f}; sd {self.sd:.4g} vs "
            f"{self.ref_sd:.4g}; tau {self.tau.tau:.0f} ({self.tau.steps_per_tau:.0f} steps/tau)"
            + ("" if self.asserted else " (not asserted: the exact value is preferred)")
        )


def mean_check(
    name: str,
    draws: npt.NDArray[np.float64],
    ref_mean: float,
    ref_sd: float,
    ref_mcse: float,
    source: str,
    asserted: bool = True,
) -> MeanCheck:
    """Mean and its MCSE of one quantity from one ensemble, ``draws`` of shape (steps, walkers).

    MCSE choice: ``sd * sqrt(tau / (walkers * steps))`` with ``tau`` the integrated
    autocorrelation time of the walker-averaged ACF (``integrated_time_report``;
    Foreman-Mackey et al. 2013, the estimator emcee recommends for one ensemble). chainyard's
    ``mcse_mean`` / ``ess_*`` follow Vehtari et al. (2021) and assume independent chains, which
    the walkers of one ensemble are not (see ``chainyard.diagnostics.ensemble``), so they are not
    applied to walkers here. The report also says whether tau can be trusted (steps > 50 tau),
    and every test asserts that before it uses the MCSE. (``mcse_mean`` on the walker-mean trace,
    ``ensemble_to_chains([draws])``, is a valid alternative that also counts cross-walker
    correlation; in trial runs the ratio of the two was 0.5-1.7 in no fixed direction, the
    single walker-mean series giving the noisier ESS estimate.)
    """
    report = integrated_time_report(walkers_as_chains(draws))
    sd = float(np.std(draws, ddof=1))
    mcse = sd * math.sqrt(report.tau / draws.size)
    return MeanCheck(
        name, source, float(draws.mean()), sd, mcse, ref_mean, ref_sd, ref_mcse, report, asserted
    )


def reference_checks(
    posterior: str, quantities: dict[str, npt.NDArray[np.float64]]
) -> list[MeanCheck]:
    """Checks of each quantity against ``exact_values`` (if any) and the reference draws.

    Where an exact value exists only it is asserted; the reference-draw comparison is still
    computed and printed. (The draws carry their own Monte Carlo error: for kidiq, beta's
    reference-draw means sit about 2 reference MCSE from the exact OLS values, which would
    shift z by up to ~2 and make a |z| < 4 check on them needlessly fragile.)
    Quantity names are the reference's (``theta[1]``, ``tau``, ...); names absent from
    ``parameter_summaries`` are looked up in ``unconstrained_summaries`` (e.g. ``log_tau``).
    """
    ref = REF[posterior]
    draws_name = ref["reference_posterior_name"]
    n_ref = int(ref["reference"]["ndraws"])  # 10,000 approximately independent draws
    exact = ref.get("exact_values", {}).get("mean_sd", {})
    checks = []
    for name, x in quantities.items():
        if name in exact:
            m, s = exact[name]
            checks.append(mean_check(name, x, m, s, 0.0, f"posteriordb exact values, {posterior}"))
        summ = ref["parameter_summaries"].get(name) or ref["unconstrained_summaries"][name]
        checks.append(
            mean_check(
                name,
                x,
                summ["mean"],
                summ["sd"],
                summ["sd"] / math.sqrt(n_ref),
                f"posteriordb reference draws, {draws_name}",
                asserted=name not in exact,
            )
        )
    return checks


def assert_agreement(checks: list[MeanCheck], accepted: npt.NDArray[np.bool_]) -> None:
    """tau reliable, no stuck walker, |z| < 4 and sd within 10% for every asserted check."""
    report = "\n".join(c.line() for c in checks)
    print(report)
    acc = acceptance_report(accepted)
    assert acc.stuck_walkers == (), acc.messages
    unreliable = [c.name for c in checks if not c.tau.reliable]
    assert not unreliable, f"tau unreliable (MCSE not trustworthy) for {unreliable}\n{report}"
    checked = [c for c in checks if c.asserted]
    bad = [c.line() for c in checked if not abs(c.z) < Z_MAX]
    assert not bad, "means disagree:\n" + "\n".join(bad)
    bad_sd = [c.line() for c in checked if not abs(c.sd / c.ref_sd - 1.0) < SD_RTOL]
    assert not bad_sd, "sds disagree:\n" + "\n".join(bad_sd)


def eight_schools_parameters(first: str) -> list[dict[str, Any]]:
    """Parameters ``<first>_1..8, mu, log_tau``, all started in a unit normal ball."""
    names = [f"{first}_{j}" for j in range(1, 9)] + ["mu", "log_tau"]
    return [{"name": n, "init": normal(0.0, 1.0)} for n in names]


@pytest.mark.slow
def test_eight_schools_noncentered_matches_reference(tmp_path: Path) -> None:
    """Non-centred eight schools: mu, tau, theta[1..8] and log tau match posteriordb."""
    posterior = "eight_schools-eight_schools_noncentered"
    store = run_posterior(
        tmp_path,
        posterior,
        "tests.reference_models.eight_schools:log_prob_noncentered",
        eight_schools_parameters("theta_trans"),
        ES_STEPS,
        seed=101,
    )
    x = store.draws(start=ES_BURN)  # burn-in: > 10 autocorrelation times (tau ~ 140)
    mu, log_tau = x[..., 8], x[..., 9]
    tau = np.exp(log_tau)
    theta = mu[..., None] + tau[..., None] * x[..., :8]  # derived: theta_j = mu + tau*theta_trans_j
    quantities = {"mu": mu, "tau": tau, "log_tau": log_tau}
    quantities |= {f"theta[{j + 1}]": theta[..., j] for j in range(8)}
    assert_agreement(reference_checks(posterior, quantities), store.accepted(start=ES_BURN))


@pytest.mark.slow
def test_kidiq_momiq_matches_reference(tmp_path: Path) -> None:
    """kidiq (kid_score ~ mom_iq, beta correlation -0.99): beta and sigma match posteriordb."""
    posterior = "kidiq-kidscore_momiq"
    params = [
        # a small ball off the posterior ridge (beta[1] + 100 beta[2] ~ 87) and off its centre;
        # a wide start (e.g. beta[2] ~ N(0, 1)) leaves walkers stuck at huge sigma for
        # thousands of steps, which acceptance_report then flags
        {"name": "beta_1", "init": normal(20.0, 2.0)},
        {"name": "beta_2", "init": normal(0.6, 0.02)},
        {"name": "log_sigma", "init": normal(3.0, 0.1)},
    ]
    store = run_posterior(
        tmp_path, posterior, "tests.reference_models.kidiq:log_prob", params, 10_000, seed=202
    )
    burn = 1_000  # tau ~ 40
    x = store.draws(start=burn)
    quantities = {"beta[1]": x[..., 0], "beta[2]": x[..., 1], "sigma": np.exp(x[..., 2])}
    assert_agreement(reference_checks(posterior, quantities), store.accepted(start=burn))


@pytest.mark.slow
def test_ark_matches_reference(tmp_path: Path) -> None:
    """AR(5) time series: alpha, beta[1..5] and sigma match posteriordb reference draws."""
    posterior = "arK-arK"
    params = [{"name": "alpha", "init": normal(0.0, 0.1)}]
    params += [{"name": f"beta_{k}", "init": normal(0.0, 0.1)} for k in range(1, 6)]
    params += [{"name": "log_sigma", "init": normal(0.0, 0.5)}]
    store = run_posterior(
        tmp_path, posterior, "tests.reference_models.ark:log_prob", params, 12_000, seed=303
    )
    burn = 2_000  # tau ~ 75
    x = store.draws(start=burn)
    quantities = {"alpha": x[..., 0]}
    quantities |= {f"beta[{k}]": x[..., k] for k in range(1, 6)}
    quantities["sigma"] = np.exp(x[..., 6])
    assert_agreement(reference_checks(posterior, quantities), store.accepted(start=burn))


@pytest.mark.slow
def test_low_dim_gauss_mix_matches_reference(tmp_path: Path) -> None:
    """Two-component mixture (ordered means): mu, sigma, theta match posteriordb draws."""
    posterior = "low_dim_gauss_mix-low_dim_gauss_mix"
    params = [
        # near the data's two clusters but not at the reference means; a wide start lets
        # walkers settle in a local mode with both means together (acceptance_report flags it)
        {"name": "mu_1", "init": normal(-2.0, 0.5)},
        {"name": "log_mu2_minus_mu1", "init": normal(1.5, 0.2)},
        {"name": "log_sigma_1", "init": normal(0.0, 0.2)},
        {"name": "log_sigma_2", "init": normal(0.0, 0.2)},
        {"name": "logit_theta", "init": normal(0.0, 0.3)},
    ]
    store = run_posterior(
        tmp_path,
        posterior,
        "tests.reference_models.low_dim_gauss_mix:log_prob",
        params,
        10_000,
        seed=404,
    )
    burn = 1_000  # tau ~ 55
    c = to_constrained(store.draws(start=burn))
    names = ["mu[1]", "mu[2]", "sigma[1]", "sigma[2]", "theta"]
    quantities = {n: c[..., i] for i, n in enumerate(names)}
    assert_agreement(reference_checks(posterior, quantities), store.accepted(start=burn))


@pytest.mark.slow
def test_eight_schools_centered_is_flagged(tmp_path: Path) -> None:
    """Centred eight schools (a funnel): chainyard's run-level verdict fails on tau for log tau.

    Same posterior, walkers, init, steps and burn-in per replica as the non-centred test, whose
    log tau gets 84-99 steps per autocorrelation time in trial runs (the 50 x tau rule holds).
    In the centred coordinates the walkers cannot follow the funnel into small tau: stretch
    moves along lines between walkers leave the narrow neck, so log tau mixes 2.5-4 times
    slower and its estimate keeps growing with the run length (measured on 4 x 32 walkers:
    tau of the whole run / tau of its first half 1.35-1.8 from 1,000 to 64,000 steps, against
    1.10 (median) on healthy runs at 100 steps per tau). ``diagnose`` across the 4 replicas
    (the same function as the CLI) must therefore say FAIL with the tau question failing for
    log tau (steps per tau below 50 and/or tau still growing), and log tau must be the
    worst-mixing parameter (fewest steps per tau).

    Nested R-hat does not see this bias (all replicas are biased alike: it compares replicas,
    values 1.001-1.009 in trial runs); the classic walker-mean R-hat is printed, not asserted.
    The mean of log tau against the posteriordb reference draws is printed but not asserted:
    in trial runs it was off by -2.3 to +5.9 MCSE, mostly upwards (the neck is under-visited).
    """
    from chainyard.analysis.diagnose import diagnose
    from chainyard.analysis.view import StoreWindow

    posterior = "eight_schools-eight_schools_centered"
    stores = [
        run_posterior(
            tmp_path,
            posterior,
            "tests.reference_models.eight_schools:log_prob_centered",
            eight_schools_parameters("theta"),
            ES_STEPS,
            seed=505,
            replica=r,
        )
        for r in range(4)
    ]
    windows = [StoreWindow(s, ES_BURN) for s in stores]
    result = diagnose(windows)  # type: ignore[arg-type]
    verdict = result["verdict"]
    print("\n".join(verdict["lines"]))
    lt = result["params"]["log_tau"]
    ref = REF[posterior]["unconstrained_summaries"]["log_tau"]
    ref_mcse = ref["sd"] / math.sqrt(REF[posterior]["reference"]["ndraws"])
    z = (lt["mean"] - ref["mean"]) / math.hypot(lt["mcse_mean"], ref_mcse)
    print(
        f"log_tau: mean {lt['mean']:.4f} vs {ref['mean']:.4f} [posteriordb reference draws, "
        f"{REF[posterior]['reference_posterior_name']}]: z = {z:+.2f} (not asserted); "
        f"tau {lt['tau']:.0f}, growth {lt['tau_growth']:.2f}, nested R-hat "
        f"{lt['rhat_nested']:.4f}, classic R-hat {lt['rhat']:.3f}"
    )

    assert not verdict["ok"]
    check = verdict["params"]["log_tau"]
    assert check["checks"]["tau"] is False, check
    assert any(f.startswith(("steps_per_tau", "tau_growth")) for f in check["failures"])
    assert verdict["more_steps"] is not None and verdict["more_steps"] > 0
    spt = {n: d["steps_per_tau"] for n, d in result["params"].items()}
    assert min(spt, key=lambda n: spt[n]) == "log_tau", spt
