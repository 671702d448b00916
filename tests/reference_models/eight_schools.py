"""Eight schools (Rubin 1981), centred and non-centred hierarchical normal models.

Source: posteriordb (stan-dev/posteriordb, commit 28f8d3d6e975315f42aa274a8399f21e07a43b30),
posteriors ``eight_schools-eight_schools_noncentered`` and ``eight_schools-eight_schools_centered``
(data ``eight_schools``: J = 8, y, sigma). Implemented from the density descriptions in
``tests/data/posteriordb/posteriors.json``.

Shared model: mu ~ Normal(0, 5); tau ~ HalfCauchy(0, 5); theta_j ~ Normal(mu, tau);
y_j ~ Normal(theta_j, sigma_j) with sigma_j known. The sampled scale of tau is u = log tau
(log-Jacobian + u).
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from tests.reference_models import FloatArray, as_rows, finish


def log_prob_noncentered(theta: npt.ArrayLike, data: dict) -> FloatArray | float:
    """Non-centred eight schools: posteriordb ``eight_schools-eight_schools_noncentered``.

    theta columns: ``theta_trans[1..8], mu, log_tau``; derived theta_j = mu + tau*theta_trans_j.

    log p = sum_j -theta_trans_j^2/2 - mu^2/50 - log(1 + (tau/5)^2)
            + sum_j -(y_j - mu - tau*theta_trans_j)^2 / (2 sigma_j^2) + u,   tau = exp(u).
    """
    x, single = as_rows(theta)
    y = np.asarray(data["y"], dtype=np.float64)
    sigma = np.asarray(data["sigma"], dtype=np.float64)
    j = y.size
    tt, mu, u = x[:, :j], x[:, j], x[:, j + 1]
    with np.errstate(over="ignore", invalid="ignore"):
        tau = np.exp(u)
        th = mu[:, None] + tau[:, None] * tt
        lp = (
            -0.5 * np.sum(tt**2, axis=1)
            - mu**2 / (2.0 * 5.0**2)
            - np.log1p((tau / 5.0) ** 2)
            - 0.5 * np.sum(((y - th) / sigma) ** 2, axis=1)
            + u
        )
    return finish(lp, single)


def log_prob_centered(theta: npt.ArrayLike, data: dict) -> FloatArray | float:
    """Centred eight schools (a funnel): posteriordb ``eight_schools-eight_schools_centered``.

    theta columns: ``theta[1..8], mu, log_tau``.

    log p = -mu^2/50 - log(1 + (tau/5)^2) + sum_j [-(theta_j - mu)^2/(2 tau^2) - log tau]
            + sum_j -(y_j - theta_j)^2/(2 sigma_j^2) + u,   tau = exp(u).
    """
    x, single = as_rows(theta)
    y = np.asarray(data["y"], dtype=np.float64)
    sigma = np.asarray(data["sigma"], dtype=np.float64)
    j = y.size
    th, mu, u = x[:, :j], x[:, j], x[:, j + 1]
    with np.errstate(over="ignore", invalid="ignore"):
        tau = np.exp(u)
        lp = (
            -(mu**2) / (2.0 * 5.0**2)
            - np.log1p((tau / 5.0) ** 2)
            - 0.5 * np.sum((th - mu[:, None]) ** 2, axis=1) * np.exp(-2.0 * u)
            - j * u
            - 0.5 * np.sum(((y - th) / sigma) ** 2, axis=1)
            + u
        )
    return finish(lp, single)
