"""Target densities of the study, vectorised, with exact samplers and reference moments.

Every ``log_prob`` takes points of shape (..., d) and returns shape (...). Every target
with ``exact`` set can be sampled exactly, so a run can start *at the target itself*
(stationary start). ``mean`` and ``sd`` are the reference moments per parameter, with
``ref_mcse_mean`` / ``ref_mcse_sd`` their own Monte Carlo error (zero when analytic).
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import numpy.typing as npt

from tests.reference_models.eight_schools import log_prob_centered

FloatArray = npt.NDArray[np.float64]
DATA = Path(__file__).resolve().parents[1] / "data" / "posteriordb" / "posteriors.json"


@dataclass(frozen=True)
class Target:
    """One target density with its reference moments (per parameter, shape (d,))."""

    name: str
    names: tuple[str, ...]
    log_prob: Callable[[FloatArray], FloatArray]
    mean: FloatArray
    sd: FloatArray
    source: str
    exact: Callable[[np.random.Generator, tuple[int, ...]], FloatArray] | None = None
    ref_mcse_mean: FloatArray = field(default_factory=lambda: np.zeros(0))
    ref_mcse_sd: FloatArray = field(default_factory=lambda: np.zeros(0))

    @property
    def dim(self) -> int:
        """Number of parameters."""
        return len(self.names)

    def mcse_ref(self) -> tuple[FloatArray, FloatArray]:
        """Reference MCSE of mean and sd, shape (d,) each (zeros if analytic)."""
        zero = np.zeros(self.dim)
        m = self.ref_mcse_mean if self.ref_mcse_mean.size else zero
        s = self.ref_mcse_sd if self.ref_mcse_sd.size else zero
        return m, s


# ----------------------------------------------------------------- correlated Gaussian

CORR_RHO = 0.9
CORR_SD = np.array([1.0, 10.0, 0.1, 1.0])


def _corr_cov() -> FloatArray:
    d = CORR_SD.size
    r = np.full((d, d), CORR_RHO)
    np.fill_diagonal(r, 1.0)
    return r * np.outer(CORR_SD, CORR_SD)


_CORR_CHOL = np.linalg.cholesky(_corr_cov())
_CORR_PREC = np.linalg.inv(_corr_cov())


def _corr_log_prob(x: FloatArray) -> FloatArray:
    return -0.5 * np.einsum("...i,ij,...j->...", x, _CORR_PREC, x)


def _corr_exact(rng: np.random.Generator, shape: tuple[int, ...]) -> FloatArray:
    return rng.standard_normal((*shape, CORR_SD.size)) @ _CORR_CHOL.T


CORR_GAUSS = Target(
    name="gauss4_corr",
    names=("x1", "x2", "x3", "x4"),
    log_prob=_corr_log_prob,
    mean=np.zeros(4),
    sd=CORR_SD.copy(),
    source="analytic: 4-D Gaussian, mean 0, sd (1, 10, 0.1, 1), all correlations 0.9",
    exact=_corr_exact,
)

# ----------------------------------------------------------------------- twisted Gaussian

BANANA_S = 10.0
BANANA_B = 0.03


def _banana_log_prob(x: FloatArray) -> FloatArray:
    x1, x2 = x[..., 0], x[..., 1]
    y2 = x2 - BANANA_B * (x1**2 - BANANA_S**2)
    return -0.5 * (x1 / BANANA_S) ** 2 - 0.5 * y2**2


def _banana_exact(rng: np.random.Generator, shape: tuple[int, ...]) -> FloatArray:
    z = rng.standard_normal((*shape, 2))
    x1 = BANANA_S * z[..., 0]
    x2 = z[..., 1] + BANANA_B * (x1**2 - BANANA_S**2)
    return np.stack([x1, x2], axis=-1)


BANANA = Target(
    name="banana",
    names=("x1", "x2"),
    log_prob=_banana_log_prob,
    # x1 ~ N(0, s^2); x2 = y2 + b (x1^2 - s^2), y2 ~ N(0, 1) independent of x1.
    # E[x2] = b (E[x1^2] - s^2) = 0. Var(x2) = 1 + b^2 Var(x1^2) and, for x1 ~ N(0, s^2),
    # E[x1^4] = 3 s^4 (Gaussian fourth moment), so Var(x1^2) = 3 s^4 - s^4 = 2 s^4:
    # sd(x2) = sqrt(1 + 2 b^2 s^4) (with s = 10, b = 0.03: sqrt(19) = 4.359).
    mean=np.zeros(2),
    sd=np.array([BANANA_S, np.sqrt(1.0 + 2.0 * BANANA_B**2 * BANANA_S**4)]),
    source=(
        "analytic: twisted Gaussian of Haario, Saksman and Tamminen (1999), Computational "
        "Statistics 14, 375-395 (s^2 = 100, b = 0.03, 2-D; the form is from memory); "
        "moments derived in targets.py"
    ),
    exact=_banana_exact,
)

# ------------------------------------------------------------------------ skewed product

GAMMA_SHAPE = np.array([1.5, 3.0, 8.0])


def _gamma_log_prob(x: FloatArray) -> FloatArray:
    with np.errstate(divide="ignore", invalid="ignore"):
        lp = np.sum((GAMMA_SHAPE - 1.0) * np.log(x) - x, axis=-1)
    return np.where(np.all(x > 0, axis=-1), lp, -np.inf)


def _gamma_exact(rng: np.random.Generator, shape: tuple[int, ...]) -> FloatArray:
    return rng.gamma(GAMMA_SHAPE, size=(*shape, GAMMA_SHAPE.size))


GAMMA = Target(
    name="gamma3",
    names=("g1", "g2", "g3"),
    log_prob=_gamma_log_prob,
    mean=GAMMA_SHAPE.copy(),  # Gamma(k, 1): mean k, variance k (textbook)
    sd=np.sqrt(GAMMA_SHAPE),
    source="analytic: independent Gamma(k, 1), k = (1.5, 3, 8): mean k, sd sqrt(k)",
    exact=_gamma_exact,
)

# ---------------------------------------------------------------------- heavy tails

T_DOF = 5.0
T_DIM = 5


def _t_log_prob(x: FloatArray) -> FloatArray:
    return np.sum(-0.5 * (T_DOF + 1.0) * np.log1p(x * x / T_DOF), axis=-1)


def _t_exact(rng: np.random.Generator, shape: tuple[int, ...]) -> FloatArray:
    return rng.standard_t(T_DOF, size=(*shape, T_DIM))


STUDENT_T = Target(
    name="student_t5",
    names=tuple(f"t{i + 1}" for i in range(T_DIM)),
    log_prob=_t_log_prob,
    mean=np.zeros(T_DIM),  # Student-t with nu > 2: mean 0, variance nu / (nu - 2) (textbook)
    sd=np.full(T_DIM, np.sqrt(T_DOF / (T_DOF - 2.0))),
    source="analytic: 5 independent Student-t with 5 dof: mean 0, sd sqrt(5/3)",
    exact=_t_exact,
)

# ---------------------------------------------------------------------------- bimodal

BIMODAL_SHIFT = 8.0  # modes at -+ 4 in each of the d coordinates (unit sd)
BIMODAL_DIM = 3


def _bimodal_log_prob(x: FloatArray) -> FloatArray:
    h = BIMODAL_SHIFT / 2.0
    a = -0.5 * np.sum((x - h) ** 2, axis=-1)
    b = -0.5 * np.sum((x + h) ** 2, axis=-1)
    return np.logaddexp(a, b)


BIMODAL = Target(
    name="bimodal",
    names=tuple(f"m{i + 1}" for i in range(BIMODAL_DIM)),
    log_prob=_bimodal_log_prob,
    # Equal mixture of N(+h, I) and N(-h, I): mean 0, variance 1 + h^2 per coordinate.
    mean=np.zeros(BIMODAL_DIM),
    sd=np.full(BIMODAL_DIM, np.sqrt(1.0 + (BIMODAL_SHIFT / 2.0) ** 2)),
    source="analytic: equal mixture of N(+4, I) and N(-4, I) in 3-D: mean 0, sd sqrt(17)",
)

# ---------------------------------------------------------------------- eight schools


def _posteriordb_entry(name: str) -> dict:
    entries = json.loads(DATA.read_text())["posteriors"]
    return next(e for e in entries if e["name"] == name)


def _eight_schools() -> Target:
    entry = _posteriordb_entry("eight_schools-eight_schools_centered")
    data = {k: np.asarray(v, dtype=np.float64) for k, v in entry["data"].items() if k != "J"}
    names = (*tuple(f"theta[{j}]" for j in range(1, 9)), "mu", "log_tau")
    exact = entry["exact_values"]["mean_sd"]
    unc = entry["unconstrained_summaries"]["log_tau"]
    ndraws = float(entry["reference"]["ndraws"])
    mean = np.array([exact[n][0] for n in names[:-1]] + [unc["mean"]])
    sd = np.array([exact[n][1] for n in names[:-1]] + [unc["sd"]])
    mcse_mean = np.zeros(len(names))
    mcse_sd = np.zeros(len(names))
    # log tau: summaries of posteriordb's 10,000 approximately independent reference draws
    # (lag-1 autocorrelation < 0.05 checked by posteriordb): MCSE sd / sqrt(n) for the mean
    # and, for the sd, sd * sqrt((kurtosis - 1) / (4 n)) with the kurtosis bounded by 6
    # (a deliberately generous bound; common practice, no source).
    mcse_mean[-1] = unc["sd"] / np.sqrt(ndraws)
    mcse_sd[-1] = unc["sd"] * np.sqrt((6.0 - 1.0) / (4.0 * ndraws))

    def lp(x: FloatArray) -> FloatArray:
        flat = x.reshape(-1, x.shape[-1])
        return np.asarray(log_prob_centered(flat, data)).reshape(x.shape[:-1])

    return Target(
        name="eight_schools_centered",
        names=names,
        log_prob=lp,
        mean=mean,
        sd=sd,
        source=(
            "posteriordb eight_schools-eight_schools_centered: exact_values (quadrature) for "
            "theta and mu; reference-draw summaries (unconstrained) for log_tau"
        ),
        ref_mcse_mean=mcse_mean,
        ref_mcse_sd=mcse_sd,
    )


EIGHT_SCHOOLS = _eight_schools()

# ------------------------------------------------------------- bivariate Gaussian (Gibbs)

GIBBS_RHO = 0.95


def _pair_log_prob(x: FloatArray) -> FloatArray:
    a, b = x[..., 0], x[..., 1]
    return -0.5 * (a * a - 2 * GIBBS_RHO * a * b + b * b) / (1 - GIBBS_RHO**2)


def _pair_exact(rng: np.random.Generator, shape: tuple[int, ...]) -> FloatArray:
    z = rng.standard_normal((*shape, 2))
    z[..., 1] = GIBBS_RHO * z[..., 0] + np.sqrt(1 - GIBBS_RHO**2) * z[..., 1]
    return z


GAUSS_PAIR = Target(
    name="gauss2_rho95",
    names=("u", "v"),
    log_prob=_pair_log_prob,
    mean=np.zeros(2),
    sd=np.ones(2),
    source="analytic: 2-D Gaussian, mean 0, sd 1, correlation 0.95",
    exact=_pair_exact,
)

#: targets of the healthy runs (stationary start)
HEALTHY = (CORR_GAUSS, BANANA, GAMMA)
