"""Three verdict statistics computed on one parameter column (helpers of ``diagnose``).

* :func:`tail_rhat`: split R-hat (rank-normalised, Vehtari et al. 2021, Bayesian Analysis
  16(2)) of each replica's mean trace of the tail indicators ``I(x <= q05)`` and ``I(x >=
  q95)`` (pooled quantiles), the larger of the two tails. It asks whether every replica,
  and both halves of each, spend the same share of time in each tail: R-hat of an indicator
  is the "local" R-hat of Vehtari et al. (2021, section 4.3) at that quantile. A funnel's
  rare, long excursions into its neck show here (measured in tests/benchmarks/RESULTS.md)
  while the bulk statistics look settled.
* :func:`score_growth`: the tau growth ratio, tau(whole run) / tau(first half), on the
  rank-normalised draws (normal scores of the pooled ranks): the same question as on the
  raw draws, robust to heavy tails, where a few extreme draws dominate the raw ACF.
* :func:`tail_move_ratio`: how often the parameter's value changes from one kept draw to
  the next when it starts in its lowest (or highest) 5%, over how often it changes overall
  (the smaller of the two tails). Near 1 when the sampler moves as freely in the tails as
  in the bulk; far below 1 when it can hardly move there, as in a funnel's neck, where
  proposals built for the wide part are almost all rejected (Betancourt and Girolami 2015,
  "Hamiltonian Monte Carlo for hierarchical models", section 2, describe that geometry).
  Unlike an R-hat it does not shrink as the run grows: a long run goes deeper into the
  neck, and the ratio falls (measured in tests/benchmarks/RESULTS.md).

Memory: the column ``x`` (given), one step-block of indicators per replica, and the
(replicas, steps) traces.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from chainyard.diagnostics import integrated_time, rhat
from chainyard.diagnostics._validation import MIN_DRAWS

FloatArray = npt.NDArray[np.float64]

#: steps of one replica's rows turned into indicators at a time
BLOCK_STEPS = 4096


def tail_rhat(x: FloatArray, stores: Sequence[Any], q05: float, q95: float) -> float | None:
    """Largest split R-hat of the replicas' mean tail-indicator traces (module docstring).

    Parameters
    ----------
    x : ndarray, shape (chains, steps)
        Raw draws of one parameter, every walker/chain of every replica, replica by replica.
    stores : sequence
        The replicas (their ``walkers`` give the row blocks of ``x``).
    q05, q95 : float
        Pooled 5% and 95% quantiles.

    Returns
    -------
    float or None
        ``None`` if an indicator is constant (no draw beyond a quantile) or R-hat is NaN.
    """
    steps = x.shape[1]
    lower = np.empty((len(stores), steps))
    upper = np.empty((len(stores), steps))
    row = 0
    for r, s in enumerate(stores):
        rows = x[row : row + s.walkers]
        for a in range(0, steps, BLOCK_STEPS):
            block = rows[:, a : a + BLOCK_STEPS]
            lower[r, a : a + block.shape[1]] = (block <= q05).mean(axis=0)
            upper[r, a : a + block.shape[1]] = (block >= q95).mean(axis=0)
        row += s.walkers
    values = [float(rhat(t)) for t in (lower, upper) if np.ptp(t) > 0]
    values = [v for v in values if np.isfinite(v)]
    return max(values) if values else None


def score_growth(scores: FloatArray, stores: Sequence[Any]) -> float | None:
    """tau(whole) / tau(first half) on normal scores, both averaged over replicas.

    ``scores`` holds the rank-normalised split chains as ``pooled_summary`` leaves them (odd
    ``steps``: the middle column is ``+inf``, set here to 0, the median score).
    """
    steps = scores.shape[1]
    half = steps // 2
    if half < MIN_DRAWS:
        return None
    if steps % 2:
        scores[:, half] = 0.0
    whole = first = 0.0
    row = 0
    for s in stores:
        rows = scores[row : row + s.walkers]
        whole += integrated_time(rows)
        first += integrated_time(rows[:, :half])
        row += s.walkers
    if not (np.isfinite(whole) and np.isfinite(first)) or first <= 0:
        return None
    return float(whole / first)


def tail_move_ratio(x: FloatArray, stores: Sequence[Any], q05: float, q95: float) -> float | None:
    """Share of moves out of each 5% tail over the share of moves overall; the smaller.

    A *move* is a change of this parameter's value between consecutive kept draws of one
    walker or chain (``x[c, t + 1] != x[c, t]``); without thinning that is an accepted
    proposal for every sampler that updates all parameters at once. The ratio for the lower
    tail is ``P(move | x[c, t] <= q05) / P(move)`` over every chain and step pair, and
    likewise above ``q95``. On thinned draws a pair spans several steps, so the ratio moves
    towards 1 and the check is weaker (``diagnose`` on a thinning record).

    Parameters
    ----------
    x : ndarray, shape (chains, steps)
        Raw draws of one parameter, every walker/chain of every replica, replica by replica.
    stores : sequence
        The replicas (their ``walkers`` give the row blocks of ``x``).
    q05, q95 : float
        Pooled 5% and 95% quantiles.

    Returns
    -------
    float or None
        ``None`` with fewer than two steps, if nothing ever moves, or if a tail is empty.
    """
    steps = x.shape[1]
    if steps < 2:
        return None
    pairs = moved = low = low_moved = high = high_moved = 0
    row = 0
    for s in stores:
        rows = x[row : row + s.walkers]
        for a in range(0, steps - 1, BLOCK_STEPS):
            block = rows[:, a : a + BLOCK_STEPS + 1]
            start = block[:, :-1]
            change = block[:, 1:] != start
            in_low = start <= q05
            in_high = start >= q95
            pairs += change.size
            moved += int(np.count_nonzero(change))
            low += int(np.count_nonzero(in_low))
            high += int(np.count_nonzero(in_high))
            low_moved += int(np.count_nonzero(change & in_low))
            high_moved += int(np.count_nonzero(change & in_high))
        row += s.walkers
    if moved == 0 or low == 0 or high == 0:
        return None
    overall = moved / pairs
    return float(min(low_moved / low, high_moved / high) / overall)
