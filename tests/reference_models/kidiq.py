"""Kid's test score on mother's IQ (Gelman & Hill, ARM ch. 3), one-predictor linear model.

Source: posteriordb (stan-dev/posteriordb, commit 28f8d3d6e975315f42aa274a8399f21e07a43b30),
posterior ``kidiq-kidscore_momiq`` (model ``kidscore_momiq``, data ``kidiq``, N = 434).
Implemented from the density description in ``tests/data/posteriordb/posteriors.json``.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from tests.reference_models import FloatArray, as_rows, finish


def log_prob(theta: npt.ArrayLike, data: dict) -> FloatArray | float:
    """posteriordb ``kidiq-kidscore_momiq``: kid_score ~ Normal(b1 + b2*mom_iq, sigma).

    theta columns: ``beta[1], beta[2], log_sigma``. Flat (improper) prior on beta;
    sigma ~ HalfCauchy(0, 2.5); sigma = exp(u) with log-Jacobian + u.

    log p = -log(1 + (sigma/2.5)^2) + sum_n [-(kid_n - b1 - b2 iq_n)^2/(2 sigma^2) - log sigma] + u.
    mom_iq is not centred (mean 100), so beta[1] and beta[2] have correlation about -0.99.
    """
    x, single = as_rows(theta)
    kid = np.asarray(data["kid_score"], dtype=np.float64)
    iq = np.asarray(data["mom_iq"], dtype=np.float64)
    b1, b2, u = x[:, 0], x[:, 1], x[:, 2]
    with np.errstate(over="ignore", invalid="ignore"):
        sigma = np.exp(u)
        resid = kid - b1[:, None] - b2[:, None] * iq
        lp = (
            -np.log1p((sigma / 2.5) ** 2)
            - 0.5 * np.sum(resid**2, axis=1) * np.exp(-2.0 * u)
            - kid.size * u
            + u
        )
    return finish(lp, single)
