"""The tail move ratio: how often a parameter moves from its 5% tails, over how often overall.

Analytic check: a chain that, at each step, keeps its value with probability ``1 - m(x)`` and
otherwise takes a fresh draw from a density ``phi`` has the stationary density
``pi(x) proportional to phi(x) / m(x)`` (a chain with holding times of mean ``1 / m(x)``:
the renewal-reward argument, common practice, no source). Its share of moves overall is
``E_pi[m] = 1 / E_phi[1 / m]``; from a region where ``m`` is constant it is that constant.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy.stats import norm

from chainyard.analysis.signals import BLOCK_STEPS, tail_move_ratio
from chainyard.decisions import Targets, assess


def _stores(*walkers: int) -> list[SimpleNamespace]:
    return [SimpleNamespace(walkers=w) for w in walkers]


def _holding_chains(chains: int, steps: int, cut: float, m_low: float, m_high: float, seed: int):
    """Chains that keep their value with probability 1 - m(x); m = m_low below ``cut``."""
    rng = np.random.default_rng(seed)
    x = np.empty((chains, steps))
    x[:, 0] = rng.standard_normal(chains)
    fresh = rng.standard_normal((chains, steps))
    u = rng.random((chains, steps))
    for t in range(1, steps):
        prev = x[:, t - 1]
        m = np.where(prev < cut, m_low, m_high)
        x[:, t] = np.where(u[:, t] < m, fresh[:, t], prev)
    return x


def test_matches_the_stationary_holding_chain() -> None:
    """m = 0.2 below -1.5, 0.6 above: the lower 5% of pi lies below -1.5, so the lower tail
    moves at 0.2 and the whole chain at 1 / E_phi[1/m]; the ratio is their quotient."""
    cut, m_low, m_high = -1.5, 0.2, 0.6
    mass_low = norm.cdf(cut)  # scipy.stats: Phi(-1.5)
    e_inv = mass_low / m_low + (1 - mass_low) / m_high
    assert mass_low / m_low / e_inv > 0.05  # pi's lower 5% is inside the slow region
    expected = m_low * e_inv  # = 0.2 / (1 / E_phi[1/m]) = 0.378
    x = _holding_chains(64, 20_000, cut, m_low, m_high, seed=1)
    q05, q95 = np.quantile(x, (0.05, 0.95))
    got = tail_move_ratio(x, _stores(32, 32), q05, q95)
    assert got == pytest.approx(expected, abs=0.015)
    assert expected == pytest.approx(0.378, abs=0.001)


def test_independent_draws_move_everywhere_alike() -> None:
    """Fresh draws at every step: every pair moves, the ratio is exactly 1."""
    x = np.random.default_rng(2).standard_normal((8, 500))
    q05, q95 = np.quantile(x, (0.05, 0.95))
    assert tail_move_ratio(x, _stores(4, 4), q05, q95) == 1.0


def test_counts_pairs_across_blocks_and_replicas() -> None:
    """Streaming over step blocks gives the same ratio as counting every pair at once."""
    steps = 2 * BLOCK_STEPS + 7
    x = _holding_chains(6, steps, -1.0, 0.3, 0.7, seed=3)
    q05, q95 = np.quantile(x, (0.05, 0.95))
    start, change = x[:, :-1], x[:, 1:] != x[:, :-1]
    overall = change.mean()
    direct = min(change[start <= q05].mean(), change[start >= q95].mean()) / overall
    assert tail_move_ratio(x, _stores(2, 4), q05, q95) == pytest.approx(direct, rel=1e-12)


def test_nothing_moving_gives_none() -> None:
    """No move at all: no ratio (the stuck rules judge such a run)."""
    x = np.repeat(np.random.default_rng(4).standard_normal((4, 1)), 50, axis=1)
    q05, q95 = np.quantile(x, (0.05, 0.95))
    assert tail_move_ratio(x, _stores(4), q05, q95) is None
    assert tail_move_ratio(x[:, :1], _stores(4), q05, q95) is None


_PASSING = {
    "rhat_nested": 1.001,
    "rhat": 1.001,
    "rhat_tail": 1.01,
    "ess_bulk": 5000.0,
    "ess_tail": 5000.0,
    "steps_per_tau": 200.0,
    "tau_growth": 1.05,
    "tau": 10.0,
}


def test_verdict_fails_below_the_limit_with_the_number() -> None:
    """Below ``min_tail_move_ratio`` the parameter fails mixing and the line shows the value."""
    v = assess({"log_tau": {**_PASSING, "tail_move_ratio": 0.2288}}, Targets(), steps=50_000)
    assert not v.ok
    assert v.params["log_tau"].failures == ("tail_move_ratio 0.2288 < 0.35",)
    assert v.params["log_tau"].checks["mixing"] is False
    ok = assess({"x": {**_PASSING, "tail_move_ratio": 0.46}}, Targets(), steps=50_000)
    assert ok.ok


def test_absent_ratio_is_not_a_failure_and_none_disables() -> None:
    """Records without the statistic (accept-reject, older records) are judged without it;
    a limit of None switches the check off."""
    assert assess({"x": dict(_PASSING)}, Targets(), steps=50_000).ok
    assert assess({"x": {**_PASSING, "tail_move_ratio": None}}, Targets(), steps=50_000).ok
    off = Targets(min_tail_move_ratio=None)
    assert assess({"x": {**_PASSING, "tail_move_ratio": 0.1}}, off, steps=50_000).ok
