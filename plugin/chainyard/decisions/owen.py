"""Cost-aware thinning: Owen (2017).

Owen, A. B. (2017), "Statistically efficient thinning of a Markov chain
sampler", J. Comput. Graph. Stat. 26(3), 738-744.

Model: advancing the chain costs 1 unit per step, evaluating (using/storing)
a retained draw costs ``theta`` units. Thinning by ``k`` with a budget ``B``
keeps ``B / (k + theta)`` draws whose mean has variance
``sigma^2 tau_k (k + theta) / B`` where ``tau_k = 1 + 2 sum_{j>=1} rho_{jk}``.
Efficiency relative to no thinning is therefore
``eff(k) = (1 + theta) tau_1 / ((k + theta) tau_k)``; for AR(1)
autocorrelations ``rho_l = rho^l`` this is
``(1 + theta)/(k + theta) * (1 + rho)/(1 - rho) * (1 - rho^k)/(1 + rho^k)``.
(Formula re-derived here from the set-up; the paper's result that ``k = 1``
is optimal iff ``theta <= (1 - rho)^2 / (2 rho)`` follows from it and is
checked in the tests.)
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from .records import ThinningDecision, keep_phrase

FloatArray = npt.NDArray[np.float64]


def ar1_efficiency(k: npt.ArrayLike, rho: float, cost_ratio: float) -> FloatArray:
    """Owen (2017) efficiency of thinning by ``k`` vs. no thinning, AR(1) case.

    Parameters
    ----------
    k : array_like of int, shape (m,)
        Thinning factors >= 1.
    rho : float
        Lag-1 autocorrelation, ``-1 < rho < 1``.
    cost_ratio : float
        ``theta``: cost of using a draw relative to one chain step.

    Returns
    -------
    ndarray, shape (m,)
    """
    kk = np.asarray(k, dtype=float)
    rk = rho**kk
    return ((1 + cost_ratio) / (kk + cost_ratio)) * ((1 + rho) / (1 - rho)) * ((1 - rk) / (1 + rk))


def acf_efficiency(k: npt.ArrayLike, acf: npt.ArrayLike, cost_ratio: float) -> FloatArray:
    """Owen (2017) efficiency of thinning by ``k`` for a general autocorrelation.

    The ACF is truncated at its first non-positive value (an initial-positive
    rule; choice made here) before forming ``tau_k = 1 + 2 sum_j rho_{jk}``.

    Parameters
    ----------
    k : array_like of int, shape (m,)
    acf : array_like, shape (L,)
        Autocorrelations at lags 0..L-1 with ``acf[0] == 1``.
    cost_ratio : float

    Returns
    -------
    ndarray, shape (m,)
    """
    rho = np.asarray(acf, dtype=float)
    nonpos = np.flatnonzero(rho <= 0)
    if nonpos.size:
        rho = rho[: nonpos[0]]
    ks = np.asarray(k, dtype=int)
    taus = np.array([1.0 + 2.0 * rho[kk::kk].sum() for kk in ks])
    tau_1 = 1.0 + 2.0 * rho[1:].sum()
    return (1 + cost_ratio) * tau_1 / ((ks + cost_ratio) * taus)


def thin_cost_aware(
    rho1_or_acf: float | npt.ArrayLike, cost_ratio: float, max_factor: int = 1_000_000
) -> ThinningDecision:
    """Thinning factor maximising Owen's (2017) statistical efficiency per unit cost.

    Owen, J. Comput. Graph. Stat. 26(3), 2017. A scalar is the lag-1
    autocorrelation of an AR(1)-like chain; an array is a full ACF. For
    ``rho <= 0`` or ``theta = 0`` no thinning is optimal.

    Parameters
    ----------
    rho1_or_acf : float or array_like, shape (L,)
    cost_ratio : float
        ``theta >= 0``.
    max_factor : int
        Largest factor considered.

    Returns
    -------
    ThinningDecision
        ``inputs`` records the efficiency gain over ``k = 1``.
    """
    theta = float(cost_ratio)
    if not theta >= 0 or not np.isfinite(theta):
        raise ValueError(f"cost_ratio must be finite and >= 0; got {cost_ratio}")
    values = np.asarray(rho1_or_acf, dtype=float)
    if not np.all(np.isfinite(values)):
        raise ValueError("rho1_or_acf contains NaN or infinite values")
    if values.ndim == 0:
        rho = float(values)
        if not -1.0 < rho < 1.0:
            raise ValueError(f"rho must lie in (-1, 1); got {rho}")
        ks = np.arange(1, max_factor + 1)
        eff = ar1_efficiency(ks, rho, theta) if rho > 0 else np.ones(1)
        what = f"AR(1) with rho = {rho:.4g}"
        inputs: dict[str, object] = {"rho": rho}
    else:
        if values.ndim != 1 or values.size < 2 or values[0] != 1.0:
            raise ValueError("acf must be 1-D with acf[0] == 1 and at least 2 lags")
        ks = np.arange(1, min(max_factor, values.size - 1) + 1)
        eff = acf_efficiency(ks, values, theta) if values[1] > 0 else np.ones(1)
        what = f"estimated ACF (lag-1 {values[1]:.4g})"
        inputs = {"acf_lags": int(values.size), "rho1": float(values[1])}
    best = int(np.argmax(eff))
    factor = int(ks[best]) if eff.size > 1 else 1
    gain = float(eff[best])
    if eff.size > 1 and factor == ks[-1]:
        raise ValueError(f"optimum thinning factor reaches max_factor={ks[-1]}; increase it")
    inputs.update({"cost_ratio": theta, "efficiency_gain": gain, "max_factor": int(max_factor)})
    reason = (
        f"{keep_phrase(factor)}: Owen (2017) cost-aware optimum for {what} "
        f"and cost ratio {theta:g} (efficiency x{gain:.2f} vs. no thinning)."
    )
    return ThinningDecision("owen2017", inputs, factor, reason)
