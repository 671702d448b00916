"""AR(K) time-series model, K = 5, on T = 200 simulated observations.

Source: posteriordb (stan-dev/posteriordb, commit 28f8d3d6e975315f42aa274a8399f21e07a43b30),
posterior ``arK-arK`` (model ``arK``, data ``arK``). Implemented from the density description in
``tests/data/posteriordb/posteriors.json``.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from tests.reference_models import FloatArray, as_rows, finish


def lag_matrix(y: npt.ArrayLike, k: int) -> tuple[FloatArray, FloatArray]:
    """Lags and responses: ``X[t - k, i] = y[t - 1 - i]`` and ``y[t]`` for t = k..T-1 (0-based)."""
    y = np.asarray(y, dtype=np.float64)
    t = np.arange(k, y.size)
    lags = np.column_stack([y[t - i] for i in range(1, k + 1)])
    return lags, y[k:]


def log_prob(theta: npt.ArrayLike, data: dict) -> FloatArray | float:
    """posteriordb ``arK-arK``: y_t ~ Normal(alpha + sum_k beta_k y_{t-k}, sigma), t = K+1..T.

    theta columns: ``alpha, beta[1..K], log_sigma``. Priors alpha, beta_k ~ Normal(0, 10);
    sigma ~ HalfCauchy(0, 2.5); sigma = exp(u) with log-Jacobian + u. The likelihood is
    conditional on the first K observations (T - K = 195 terms); no stationarity constraint.

    log p = -alpha^2/200 - sum_k beta_k^2/200 - log(1 + (sigma/2.5)^2)
            + sum_t [-(y_t - mu_t)^2/(2 sigma^2) - log sigma] + u.
    """
    x, single = as_rows(theta)
    k = int(data["K"])
    lags, resp = lag_matrix(data["y"], k)
    alpha, beta, u = x[:, 0], x[:, 1 : k + 1], x[:, k + 1]
    with np.errstate(over="ignore", invalid="ignore"):
        sigma = np.exp(u)
        resid = resp - alpha[:, None] - beta @ lags.T
        lp = (
            -(alpha**2) / 200.0
            - np.sum(beta**2, axis=1) / 200.0
            - np.log1p((sigma / 2.5) ** 2)
            - 0.5 * np.sum(resid**2, axis=1) * np.exp(-2.0 * u)
            - resp.size * u
            + u
        )
    return finish(lp, single)
