"""Two-component univariate Gaussian mixture on N = 1000 simulated observations.

Source: posteriordb (stan-dev/posteriordb, commit 28f8d3d6e975315f42aa274a8399f21e07a43b30),
posterior ``low_dim_gauss_mix-low_dim_gauss_mix`` (model and data ``low_dim_gauss_mix``).
Implemented from the density description in ``tests/data/posteriordb/posteriors.json``.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from tests.reference_models import FloatArray, as_rows, finish

_HALF_LOG_2PI = 0.5 * np.log(2.0 * np.pi)


def to_constrained(x: npt.ArrayLike) -> FloatArray:
    """Unconstrained ``(mu1, log(mu2 - mu1), log sigma1, log sigma2, logit theta)`` (..., 5) ->
    constrained ``(mu1, mu2, sigma1, sigma2, theta)`` (..., 5)."""
    x = np.asarray(x, dtype=np.float64)
    out = np.empty_like(x)
    out[..., 0] = x[..., 0]
    out[..., 1] = x[..., 0] + np.exp(x[..., 1])
    out[..., 2] = np.exp(x[..., 2])
    out[..., 3] = np.exp(x[..., 3])
    out[..., 4] = 1.0 / (1.0 + np.exp(-x[..., 4]))
    return out


def log_prob(theta: npt.ArrayLike, data: dict) -> FloatArray | float:
    """posteriordb ``low_dim_gauss_mix-low_dim_gauss_mix``: y_n ~ th N(mu1, s1) + (1-th) N(mu2, s2).

    theta columns (unconstrained): ``mu1, v2, w1, w2, z`` with mu2 = mu1 + exp(v2) (ordering
    mu1 < mu2 identifies the labels), sigma_i = exp(w_i), theta = logistic(z) (weight of the
    LOWER-mean component). Priors: mu_i ~ Normal(0, 2); sigma_i ~ HalfNormal(0, 2);
    theta ~ Beta(5, 5).

    log p = -(mu1^2 + mu2^2)/8 - (sigma1^2 + sigma2^2)/8 + 4 log th + 4 log(1 - th)
            + sum_n logaddexp(log th + log N(y_n|mu1, s1), log(1 - th) + log N(y_n|mu2, s2))
            + v2 + w1 + w2 + log th + log(1 - th).
    """
    x, single = as_rows(theta)
    y = np.asarray(data["y"], dtype=np.float64)
    mu1, v2, w1, w2, z = (x[:, i] for i in range(5))
    with np.errstate(over="ignore", invalid="ignore"):
        mu2 = mu1 + np.exp(v2)
        s1, s2 = np.exp(w1), np.exp(w2)
        log_th = -np.logaddexp(0.0, -z)  # log logistic(z)
        log_1m_th = -np.logaddexp(0.0, z)  # log (1 - logistic(z))
        lp1 = -0.5 * ((y - mu1[:, None]) / s1[:, None]) ** 2 - w1[:, None] - _HALF_LOG_2PI
        lp2 = -0.5 * ((y - mu2[:, None]) / s2[:, None]) ** 2 - w2[:, None] - _HALF_LOG_2PI
        loglik = np.sum(np.logaddexp(log_th[:, None] + lp1, log_1m_th[:, None] + lp2), axis=1)
        lp = (
            -(mu1**2 + mu2**2) / 8.0
            - (s1**2 + s2**2) / 8.0
            + 4.0 * log_th
            + 4.0 * log_1m_th
            + loglik
            + v2
            + w1
            + w2
            + log_th
            + log_1m_th
        )
    return finish(lp, single)
