"""The run families of the study: healthy runs and five kinds of wrong runs.

A family makes a batch of runs for given seeds and a length; run ``seed`` of family ``f`` at
length ``n`` uses ``numpy.random.default_rng([FAMILY_CODE[f], n, seed])`` alone, so every run
can be reproduced on its own (:func:`simulate` with a one-seed list).

Shapes: every run has :data:`REPLICAS` independent ensembles of :data:`WALKERS` walkers.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .samplers import (
    Runs,
    adaptive_random_walk,
    exact_draws,
    gibbs_pair,
    random_walk,
    stretch,
)
from .targets import (
    BANANA,
    BIMODAL,
    CORR_GAUSS,
    EIGHT_SCHOOLS,
    GAMMA,
    GAUSS_PAIR,
    GIBBS_RHO,
    STUDENT_T,
    Target,
)

REPLICAS = 4
WALKERS = 32

#: the heavy-tailed Metropolis-Hastings case (issue 18, item 11): 4 replicas x 8 chains,
#: proposal sd 1 per parameter adapted per chain over the first 1,000 steps, then frozen
T_MH_CHAINS = 8
T_MH_ADAPT = 1000
#: tau (steps) of the slowest parameter, measured by ``bench_verdict.py --measure-tau``
#: (4 runs x 4 replicas x 20,000 steps, first 2,000 dropped, emcee.autocorr.integrated_time
#: per replica, averaged; 2026-12-03): 22.8 (sd over replicas 3.1)
T_MH_TAU = 22.8

#: integrated autocorrelation time (steps) of the slowest parameter of each healthy target
#: under the stretch move with 32 walkers, measured once by ``bench_verdict.py --measure-tau``
#: (16 ensembles x 20,000 steps, emcee.autocorr.integrated_time per ensemble, averaged;
#: 2026-12-02): gauss4_corr 48.7 (sd over ensembles 2.0), banana 188 (13), gamma3 52.1 (1.0)
#: the Gibbs sampler of the 2-D Gaussian (kind "kernel", 8 chains per replica): analytic
#: tau (1 + rho^2) / (1 - rho^2) sweeps (see tests/statistics/samplers.py), 19.5 at 0.95
GIBBS_CHAINS = 8
GIBBS_TAU = (1 + GIBBS_RHO**2) / (1 - GIBBS_RHO**2)
#: accept-reject runs (kind "accept_reject", 8 chains per replica) store exact independent
#: draws: tau 1, so "k steps per tau" is k draws per chain
AR_CHAINS = 8

TAU = {
    "gauss4_corr": 48.7,
    "banana": 188.0,
    "gamma3": 52.1,
    "student_t5_mh": T_MH_TAU,
    "gauss2_gibbs": GIBBS_TAU,
    "gauss4_exact": 1.0,
}

FAMILY_CODE = {
    "healthy/gauss4_corr": 1,
    "healthy/banana": 2,
    "healthy/gamma3": 3,
    "eight_schools": 11,
    "bimodal": 12,
    "stuck_walker": 13,
    "small_step": 14,
    "far_start": 15,
    "healthy/student_t5_mh": 4,
    "healthy/gauss2_gibbs": 5,
    "healthy/gauss4_exact": 6,
}

HEALTHY_TARGETS = {"gauss4_corr": CORR_GAUSS, "banana": BANANA, "gamma3": GAMMA}

#: proposal sd of the too-small random-walk move, as a fraction of each marginal sd
SMALL_STEP = 0.02
#: distance of the far start from the mean, in marginal sds (alternating signs)
FAR = 20.0


@dataclass(frozen=True)
class Family:
    """A kind of run: its name, target and whether it is healthy."""

    name: str
    target: Target
    healthy: bool
    what: str
    move_kinds: tuple[str, ...] | None = None
    kind: str = "ensemble"
    walkers: int = WALKERS


FAMILIES = {
    **{
        f"healthy/{k}": Family(
            f"healthy/{k}", t, True, f"stretch move, started at the target ({t.source})"
        )
        for k, t in HEALTHY_TARGETS.items()
    },
    "healthy/student_t5_mh": Family(
        "healthy/student_t5_mh",
        STUDENT_T,
        True,
        f"Metropolis-Hastings, {T_MH_CHAINS} chains per replica, proposal sd 1 adapted per "
        f"chain towards acceptance 0.234 over the first {T_MH_ADAPT:,} steps then frozen, "
        f"started at the target ({STUDENT_T.source})",
        ("metropolis_hastings",),
        "metropolis_hastings",
        T_MH_CHAINS,
    ),
    "healthy/gauss2_gibbs": Family(
        "healthy/gauss2_gibbs",
        GAUSS_PAIR,
        True,
        f"systematic-scan Gibbs (a user kernel), {GIBBS_CHAINS} chains per replica, started "
        f"at the target ({GAUSS_PAIR.source})",
        ("kernel",),
        "kernel",
        GIBBS_CHAINS,
    ),
    "healthy/gauss4_exact": Family(
        "healthy/gauss4_exact",
        CORR_GAUSS,
        True,
        f"independent exact draws, as accept-reject stores them, {AR_CHAINS} chains per "
        f"replica ({CORR_GAUSS.source})",
        ("accept_reject",),
        "accept_reject",
        AR_CHAINS,
    ),
    "eight_schools": Family(
        "eight_schools",
        EIGHT_SCHOOLS,
        False,
        "centred eight schools (a funnel), stretch move, walkers started from independent "
        "normals with the reference means and sds",
    ),
    "bimodal": Family(
        "bimodal",
        BIMODAL,
        False,
        "two far-apart modes; each replica's walkers start in the + mode with its own "
        "fraction, uniform on 6..26 of 32 (the stretch move cannot cross)",
    ),
    "stuck_walker": Family(
        "stuck_walker",
        CORR_GAUSS,
        False,
        "correlated Gaussian from the target, but walker 0 of replica 0 sits at 2.5 sd and "
        "its proposals are always rejected",
    ),
    "small_step": Family(
        "small_step",
        CORR_GAUSS,
        False,
        f"correlated Gaussian from the target, Gaussian random-walk Metropolis per walker "
        f"with proposal sd {SMALL_STEP} x marginal sd",
        ("gaussian",),
    ),
    "far_start": Family(
        "far_start",
        CORR_GAUSS,
        False,
        f"correlated Gaussian, all walkers started in a tight ball {FAR:g} sd from the mean, "
        "stopped early",
    ),
}


def steps_for(family: str, steps_per_tau: float) -> int:
    """Steps of a healthy run of ``family`` at ``steps_per_tau`` (rounded)."""
    return round(steps_per_tau * TAU[family.split("/", 1)[1]])


def _gens(family: str, steps: int, seeds: Sequence[int]) -> list[np.random.Generator]:
    return [np.random.default_rng([FAMILY_CODE[family], steps, int(s)]) for s in seeds]


def simulate(family: str, steps: int, seeds: Sequence[int]) -> Runs:
    """Runs of ``family`` of ``steps`` steps for each seed (see :class:`Runs` for shapes)."""
    fam = FAMILIES[family]
    tg = fam.target
    gens = _gens(family, steps, seeds)
    shape = (REPLICAS, fam.walkers)
    if family == "healthy/student_t5_mh":
        start = np.stack([tg.exact(g, shape) for g in gens])  # type: ignore[misc]
        return adaptive_random_walk(tg.log_prob, start, steps, gens, np.ones(tg.dim), T_MH_ADAPT)
    if family == "healthy/gauss2_gibbs":
        start = np.stack([tg.exact(g, shape) for g in gens])  # type: ignore[misc]
        return gibbs_pair(start, steps, gens, GIBBS_RHO)
    if family == "healthy/gauss4_exact":
        return exact_draws(tg.exact, tg.log_prob, (REPLICAS, steps, fam.walkers), gens)  # type: ignore[arg-type]
    if fam.healthy:
        start = np.stack([tg.exact(g, shape) for g in gens])  # type: ignore[misc]
        return stretch(tg.log_prob, start, steps, gens)
    if family == "eight_schools":
        start = np.stack([tg.mean + tg.sd * g.standard_normal((*shape, tg.dim)) for g in gens])
        return stretch(tg.log_prob, start, steps, gens)
    if family == "bimodal":
        h = 4.0
        starts = []
        for g in gens:
            x = g.standard_normal((*shape, tg.dim))
            plus = g.integers(6, 27, size=REPLICAS)
            sign = np.where(np.arange(WALKERS)[None, :] < plus[:, None], 1.0, -1.0)
            starts.append(x + h * sign[..., None])
        return stretch(tg.log_prob, np.stack(starts), steps, gens)
    if family == "stuck_walker":
        start = np.stack([CORR_GAUSS.exact(g, shape) for g in gens])  # type: ignore[misc]
        start[:, 0, 0] = 2.5 * CORR_GAUSS.sd
        stuck = np.zeros((len(gens), *shape), dtype=bool)
        stuck[:, 0, 0] = True
        return stretch(tg.log_prob, start, steps, gens, stuck=stuck)
    if family == "small_step":
        start = np.stack([CORR_GAUSS.exact(g, shape) for g in gens])  # type: ignore[misc]
        return random_walk(tg.log_prob, start, steps, gens, SMALL_STEP * CORR_GAUSS.sd)
    if family == "far_start":
        centre = FAR * CORR_GAUSS.sd * np.array([1.0, -1.0, 1.0, -1.0])
        start = np.stack(
            [centre + 0.01 * CORR_GAUSS.sd * g.standard_normal((*shape, tg.dim)) for g in gens]
        )
        return stretch(tg.log_prob, start, steps, gens)
    raise KeyError(family)
