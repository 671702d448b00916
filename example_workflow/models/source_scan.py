"""Locating a lost check source along a tile stack from a perpendicular probe scan.

Set-up
------
A sealed check source lies somewhere inside a stack of ceramic tiles along the x axis
(stack centre at x = 0, half-length 60 cm). A count-rate probe is raised along the
perpendicular through the stack centre and counts for ``live_s`` seconds at each
height ``y`` above the source line. Inverse-square law plus a flat background::

    counts_i ~ Poisson(live_s_i * (bkg + R1 * (100 cm)^2 / (x_src^2 + y_i^2)))

The expected counts depend on ``x_src`` only through ``x_src^2``: the scan tells how
far the source is from the centre, not on which side. The posterior therefore has
two mirror-image modes at +|x_src| and -|x_src|, far apart compared with their widths.
This is the deliberately hard target of the example workflow.

Parameters (theta columns, in this order)
-----------------------------------------
x_src : cm
    Source position along the stack, measured from its centre.
log_R1 : ln(counts/s)
    Natural log of the count rate the source alone gives at 1 m.
bkg : counts/s
    Background count rate (> 0).

Priors (weakly informative, independent)
----------------------------------------
x_src  ~ Uniform(-60, 60)        anywhere in the stack (the run config sets the bounds)
log_R1 ~ Normal(log(10), 2)      a check source gives ~0.1-500 counts/s at 1 m (95 %)
bkg    ~ HalfNormal(5)           lab background is a few counts/s at most

The Poisson log-likelihood omits the constant ``-sum(log(counts_i!))`` and the priors
their normalising constants, so ``log_prob`` is the log posterior up to a constant.

Data
----
``data`` is the dict chainyard builds from ``data/source_scan.csv``: ``y_cm``,
``live_s`` and ``counts``, all 1-D float64 arrays.
"""

from __future__ import annotations

import numpy as np

X_HALF_LENGTH = 60.0  # cm
LOG_R1_PRIOR_LOC = float(np.log(10.0))


def log_prob(theta: np.ndarray, data: dict[str, np.ndarray]) -> np.ndarray:
    """Log posterior (up to a constant) for theta of shape (walkers, 3) -> (walkers,).

    A 1-D theta of shape (3,) is also accepted and gives a 0-d result.
    """
    theta = np.asarray(theta, dtype=np.float64)
    single = theta.ndim == 1
    theta = np.atleast_2d(theta)
    x_src, log_r1, bkg = (theta[:, k : k + 1] for k in range(3))
    y = data["y_cm"][np.newaxis, :]
    live = data["live_s"][np.newaxis, :]
    counts = data["counts"][np.newaxis, :]

    ok = (bkg[:, 0] > 0.0) & (np.abs(x_src[:, 0]) <= X_HALF_LENGTH)
    safe_bkg = np.where(bkg > 0.0, bkg, 0.0)
    with np.errstate(all="ignore"):
        mu = live * (safe_bkg + np.exp(log_r1) * 1.0e4 / (x_src**2 + y**2))
        loglike = np.sum(counts * np.log(mu) - mu, axis=1)

    # Priors up to additive constants: flat in x_src, normal in log_R1, half-normal in bkg.
    logprior = -0.5 * ((log_r1[:, 0] - LOG_R1_PRIOR_LOC) / 2.0) ** 2 - 0.5 * (bkg[:, 0] / 5.0) ** 2
    out = np.where(ok & np.isfinite(loglike), loglike + logprior, -np.inf)
    return out[0] if single else out
