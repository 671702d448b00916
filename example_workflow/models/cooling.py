"""Newton cooling of a ceramic coupon in a switched-off furnace (thermocouple readings).

Model
-----
Lumped-capacitance cooling towards the surroundings, read with Gaussian noise::

    T_i ~ Normal(T_ambient + (T_start - T_ambient) * exp(-t_i / tau), sigma^2)

Parameters (theta columns, in this order)
-----------------------------------------
T_ambient : degC
    Temperature the coupon relaxes to (furnace surroundings / lab air).
T_start : degC
    Coupon temperature at t = 0, when the heater was switched off.
log_tau : ln(min)
    Natural log of the cooling time constant tau in minutes.
sigma : degC
    Standard deviation of the read-out noise (> 0).

Priors (weakly informative, independent)
----------------------------------------
T_ambient ~ Normal(22, 10)          a lab is somewhere between 0 and 45 degC
T_start   ~ Normal(800, 300)        the firing programme ends near 800 degC
log_tau   ~ Normal(log(60), 1.5)    tau between about 3 min and 20 h (95 %)
sigma     ~ HalfNormal(10)          a type-K thermocouple is good to a few degC

The run configuration additionally bounds the parameters to physical ranges; outside
them chainyard returns -inf without calling this function. ``sigma <= 0`` is also
rejected here so the function is safe on its own.

Data
----
``data`` is the dict chainyard builds from ``data/cooling.csv``: ``t_min`` (minutes
since heater off) and ``T_degC`` (reading), both 1-D float64 arrays.
"""

from __future__ import annotations

import numpy as np

LOG_2PI = float(np.log(2.0 * np.pi))


def _normal_logpdf(x: np.ndarray, loc: float, scale: float) -> np.ndarray:
    z = (x - loc) / scale
    return -0.5 * z * z - np.log(scale) - 0.5 * LOG_2PI


def log_prob(theta: np.ndarray, data: dict[str, np.ndarray]) -> np.ndarray:
    """Log posterior (up to a constant) for theta of shape (walkers, 4) -> (walkers,).

    A 1-D theta of shape (4,) is also accepted and gives a 0-d result.
    """
    theta = np.asarray(theta, dtype=np.float64)
    single = theta.ndim == 1
    theta = np.atleast_2d(theta)
    t_amb, t_start, log_tau, sigma = (theta[:, k : k + 1] for k in range(4))
    t = data["t_min"][np.newaxis, :]
    y = data["T_degC"][np.newaxis, :]

    ok = sigma[:, 0] > 0.0
    safe_sigma = np.where(sigma > 0.0, sigma, 1.0)
    with np.errstate(all="ignore"):
        mean = t_amb + (t_start - t_amb) * np.exp(-t / np.exp(log_tau))
        z = (y - mean) / safe_sigma
        loglike = -0.5 * np.sum(z * z, axis=1) - y.shape[1] * (
            np.log(safe_sigma[:, 0]) + 0.5 * LOG_2PI
        )

    logprior = (
        _normal_logpdf(t_amb[:, 0], 22.0, 10.0)
        + _normal_logpdf(t_start[:, 0], 800.0, 300.0)
        + _normal_logpdf(log_tau[:, 0], float(np.log(60.0)), 1.5)
        + _normal_logpdf(sigma[:, 0], 0.0, 10.0)  # half-normal up to the constant log 2
    )
    out = np.where(ok & np.isfinite(loglike), loglike + logprior, -np.inf)
    return out[0] if single else out
