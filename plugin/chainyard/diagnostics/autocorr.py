"""Integrated autocorrelation time of an emcee ensemble, one parameter at a time.

For an affine-invariant ensemble (Goodman & Weare 2010, Comm. App. Math.
Comp. Sci. 5(1)) the "chains" axis holds the walkers of one ensemble. The
normalised autocorrelation function is estimated per walker by FFT,
averaged over walkers, and the integrated time is truncated with Sokal's
(1997) automatic window: the smallest ``M`` with ``M >= c * tau(M)``. This is
the estimator of Foreman-Mackey, Hogg, Lang and Goodman (2013), PASP
125(925), 306 ("emcee: The MCMC Hammer"), used by ``emcee.autocorr``.

Conventions: walkers with zero variance (e.g. stuck walkers that never
accept) carry no autocorrelation information and are left out of the
average; if every walker is constant ``tau`` is ``nan``.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
import numpy.typing as npt

from ._acf import autocorrelation
from ._validation import as_chains_draws
from .ess import rows_per_block

IntArray = npt.NDArray[np.int64]
FloatArray = npt.NDArray[np.float64]


@dataclass(frozen=True)
class IntegratedTimeReport:
    """Integrated autocorrelation time with a reliability verdict.

    Attributes
    ----------
    tau : float
        Estimated integrated autocorrelation time, in steps.
    window : int
        Sokal window ``M`` used for truncation.
    draws : int
        Steps per walker.
    steps_per_tau : float
        ``draws / tau``.
    reliable : bool
        ``draws > min_steps_per_tau * tau`` (common practice for ensembles).
    min_steps_per_tau : float
        Threshold used for ``reliable``.
    excluded_walkers : int
        Constant walkers left out of the average.
    message : str
        Empty when reliable, otherwise one line saying why not.
    """

    tau: float
    window: int
    draws: int
    steps_per_tau: float
    reliable: bool
    min_steps_per_tau: float
    excluded_walkers: int
    message: str

    def to_dict(self) -> dict[str, float | int | bool | str]:
        """Return a JSON-serialisable dict of the fields."""
        return asdict(self)


def _walker_mean_acf(x: FloatArray) -> tuple[FloatArray, int]:
    """Walker-averaged normalised ACF of (walkers, steps) and #constant walkers.

    Walkers are transformed a block at a time (about 2 MiB of draws per block) and their
    ACFs summed in walker order, so memory stays at one block's FFT whatever the number of
    walkers, with the same value as averaging the stacked ACFs.
    """
    varying = np.flatnonzero(np.ptp(x, axis=1) > 0.0)
    n_excluded = int(x.shape[0] - varying.size)
    if varying.size == 0:
        return np.full(x.shape[1], np.nan), n_excluded
    k = rows_per_block(x.shape[1])
    total: FloatArray | None = None
    for a in range(0, varying.size, k):
        rows = varying[a : a + k]
        contiguous = rows[-1] - rows[0] == rows.size - 1
        block = x[rows[0] : rows[-1] + 1] if contiguous else x[rows]
        for row in autocorrelation(block):
            if total is None:
                total = row.copy()
            else:
                total += row
    assert total is not None
    total /= varying.size
    return total, n_excluded


def _sokal_window(taus: FloatArray, c: float) -> int:
    """Smallest lag ``M`` with ``M >= c * taus[M]``; the last lag if none."""
    ok = np.arange(taus.size) >= c * taus
    return int(np.argmax(ok)) if ok.any() else int(taus.size - 1)


def _tau_and_window(x: FloatArray, c: float) -> tuple[float, int, int]:
    acf, n_excluded = _walker_mean_acf(x)
    if np.isnan(acf[0]):
        return float("nan"), 0, n_excluded
    taus = 2.0 * np.cumsum(acf) - 1.0
    window = _sokal_window(taus, c)
    return float(taus[window]), window, n_excluded


def integrated_time(x: npt.ArrayLike, c: float = 5.0, min_steps_per_tau: float = 50.0) -> float:
    """Integrated autocorrelation time ``tau`` of one parameter of an ensemble.

    Walker-averaged FFT autocorrelation with Sokal (1997) automatic
    windowing, as in Foreman-Mackey et al. (2013), PASP 125, 306, and
    Goodman & Weare (2010), CAMCoS 5(1). Never raises for short chains; use
    :func:`integrated_time_report` to learn whether the value is reliable.

    Parameters
    ----------
    x : array_like, shape (walkers, steps)
        One parameter; walkers of one ensemble along axis 0.
    c : float
        Sokal window constant.
    min_steps_per_tau : float
        Unused here; accepted so the signature matches the report function.

    Returns
    -------
    float
        ``tau`` in steps, or ``nan`` if every walker is constant.
    """
    del min_steps_per_tau
    arr = as_chains_draws(x, min_draws=2)
    return _tau_and_window(arr, c)[0]


def integrated_time_report(
    x: npt.ArrayLike, c: float = 5.0, min_steps_per_tau: float = 50.0
) -> IntegratedTimeReport:
    """Integrated time plus reliability, following Foreman-Mackey et al. (2013).

    The estimate is flagged unreliable unless ``steps > min_steps_per_tau *
    tau``; 50 is the ``emcee`` default tolerance (common practice for
    ensembles, no formal source).

    Parameters
    ----------
    x : array_like, shape (walkers, steps)
    c : float
        Sokal window constant.
    min_steps_per_tau : float
        Reliability threshold on ``steps / tau``.

    Returns
    -------
    IntegratedTimeReport
    """
    arr = as_chains_draws(x, min_draws=2)
    tau, window, n_excluded = _tau_and_window(arr, c)
    draws = int(arr.shape[1])
    if np.isnan(tau):
        return IntegratedTimeReport(
            tau,
            window,
            draws,
            float("nan"),
            False,
            float(min_steps_per_tau),
            n_excluded,
            "All walkers are constant; the autocorrelation time is undefined.",
        )
    steps_per_tau = draws / tau
    reliable = bool(draws > min_steps_per_tau * tau)
    message = ""
    if not reliable:
        message = (
            f"Chain of {draws} steps is shorter than {min_steps_per_tau:g} x tau "
            f"(tau = {tau:.1f}, {steps_per_tau:.1f} steps per tau); tau is likely underestimated."
        )
    return IntegratedTimeReport(
        tau,
        window,
        draws,
        float(steps_per_tau),
        reliable,
        float(min_steps_per_tau),
        n_excluded,
        message,
    )


def integrated_time_history(
    x: npt.ArrayLike, n_points: int = 10, c: float = 5.0, min_length: int = 100
) -> tuple[IntArray, FloatArray]:
    """Integrated time estimated on growing prefixes of the chain.

    Lengths are geometrically spaced from ``min(min_length, steps)`` to
    ``steps``, as in the emcee autocorrelation tutorial; a plot of ``tau``
    against length (with the line ``length / 50``) shows whether the
    estimate has stabilised (Foreman-Mackey et al. 2013, PASP 125, 306).

    Parameters
    ----------
    x : array_like, shape (walkers, steps)
    n_points : int
        Number of prefix lengths (duplicates after rounding are dropped).
    c : float
        Sokal window constant.
    min_length : int
        Shortest prefix.

    Returns
    -------
    lengths : ndarray of int, shape (k,)
    taus : ndarray of float, shape (k,)
    """
    if n_points < 1:
        raise ValueError(f"n_points must be >= 1; got {n_points}")
    arr = as_chains_draws(x, min_draws=2)
    steps = arr.shape[1]
    start = max(2, min(min_length, steps))
    lengths = np.unique(np.geomspace(start, steps, n_points).round().astype(np.int64))
    taus = np.array([_tau_and_window(arr[:, :n], c)[0] for n in lengths])
    return lengths, taus
