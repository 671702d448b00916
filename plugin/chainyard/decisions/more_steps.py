"""How many steps would meet the failed precision and tau targets.

:func:`steps_needed` models the windowed tau estimate's low bias (:func:`long_run_tau`), ESS
in proportion to the steps, and adds a stated margin (:data:`STEPS_MARGIN`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from .verdict_records import Targets


def _get(diag: Mapping[str, Any], key: str) -> float | None:
    value = diag.get(key)
    return None if value is None else float(value)


#: Safety factor on the estimated steps still needed (stated in the advice): the long-run tau
#: is extrapolated from one noisy estimate, and a longer run's burn-in cut may grow.
STEPS_MARGIN = 1.25

#: The Sokal window constant of the verdict's tau (:func:`chainyard.diagnostics.integrated_time`).
WINDOW_C = 5.0

#: The growth ratio the model must predict at the suggested length, as a share of the
#: limit's distance from 1 (2/3: with limit 1.3 the model's ratio is 1.2, so that the
#: estimator's noise, sd about 0.03-0.04 at 50 steps per tau, rarely crosses the limit).
GROWTH_HEADROOM = 2.0 / 3.0

#: Largest correction of the tau estimate (reached at 20 estimated steps per tau); shorter
#: runs get at least twice their length instead.
MAX_TAU_CORRECTION = 2.0


def long_run_tau(tau: float, steps: int) -> float | None:
    """The long-run tau ``T`` from the windowed estimate on ``steps`` steps.

    Each walker's autocovariances are taken about its own sample mean, which biases every lag
    low by about ``tau sigma^2 / L``; summed over the ``2 M + 1`` lags of the Sokal window
    ``M = c tau`` this makes the estimate about ``T (1 - 2 c tau / L)`` (the order of the bias
    as in Sokal 1997, from memory; the constant ``2 c = 10`` checked by this project's study:
    on the correlated Gaussian, the estimate is 0.66, 0.75 and 0.87 of the long-run tau at 20,
    31 and 50 steps per tau, where the model gives 0.66, 0.75 and 0.85). So
    ``T = tau / (1 - 2 c tau / L)``.

    Returns
    -------
    float or None
        ``T`` (steps); ``None`` when the run is too short for the correction (fewer than
        ``2 c MAX_TAU_CORRECTION / (MAX_TAU_CORRECTION - 1)`` estimated steps per tau).
    """
    if not (math.isfinite(tau) and tau > 0 and steps > 0):
        return None
    shrink = 1.0 - 2.0 * WINDOW_C * tau / steps
    if shrink < 1.0 / MAX_TAU_CORRECTION:
        return None
    return tau / shrink


def steps_needed(
    diag: Mapping[str, Any], targets: Targets, steps: int, failed: set[str]
) -> int | None:
    """Estimated total steps (after burn-in) that would meet the failed precision/tau targets.

    With the long-run tau ``T`` (:func:`long_run_tau`), the estimate at ``L'`` steps is
    ``tau(L') = T / (1 + 2 c T / L')``; so

    * the 50-tau rule (``L' / tau(L') >= k``) needs ``L' >= (k - 2 c) T`` (with the defaults
      40 long-run taus: the effective gate, see :mod:`chainyard.decisions.targets`);
    * the growth check needs the model's ``tau(L') / tau(L'/2) = (1 + 4 c T / L') / (1 + 2 c
      T / L')`` at most ``g = 1 + GROWTH_HEADROOM (max_tau_growth - 1)``, i.e. ``L' >= 2 c (2
      - g) T / (g - 1)``;
    * ESS grows in proportion to the steps (a stationary chain).

    The largest of these times :data:`STEPS_MARGIN` is returned (at least ``steps + 1``). A
    run too short for the tau correction gets at least twice its length. Measured pass rates
    after following it once: ``tests/benchmarks/RESULTS.md``.

    Parameters
    ----------
    diag : mapping
        ``ess_bulk``, ``ess_tail``, ``tau`` (steps) as available.
    targets : Targets
    steps : int
        Steps per walker after burn-in the diagnostics were computed on.
    failed : set of str
        Keys of the failed checks.

    Returns
    -------
    int or None
        ``None`` if no failed check is a precision or tau check or none can be estimated.
    """
    tau = _get(diag, "tau")
    big_t = long_run_tau(tau, steps) if tau is not None else None
    two_c = 2.0 * WINDOW_C
    need: list[float] = []
    k = targets.min_steps_per_tau
    tau_failed = {"steps_per_tau", "tau_growth"} & failed
    if tau_failed and big_t is None:
        need.append(2.0 * steps)
    if "steps_per_tau" in failed and k and big_t is not None:
        need.append(max(k - two_c, 1.0) * big_t)
    limit = targets.max_tau_growth
    if "tau_growth" in failed and big_t is not None and limit is not None and limit > 1.0:
        g = 1.0 + GROWTH_HEADROOM * (limit - 1.0)
        need.append(two_c * max(2.0 - g, 0.0) * big_t / (g - 1.0))
    for key, target in (("ess_bulk", targets.min_ess_bulk), ("ess_tail", targets.min_ess_tail)):
        value = _get(diag, key)
        if key in failed and target is not None and value is not None and value > 0:
            need.append(steps * target / value)
    need = [n * STEPS_MARGIN for n in need if math.isfinite(n)]
    if not need:
        return None
    return max(math.ceil(max(need)), steps + 1)
