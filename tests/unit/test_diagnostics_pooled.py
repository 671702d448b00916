"""The bounded-memory paths (one-argsort rank normalisation, blockwise ESS, pooled_summary)
give the same values as the reference computations."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from scipy.signal import lfilter

from chainyard.diagnostics import _validation as validation
from chainyard.diagnostics import (
    ess_bulk,
    ess_mean,
    ess_quantile,
    ess_tail,
    mcse_mean,
    mcse_quantile,
    pooled_summary,
)
from chainyard.diagnostics._validation import (
    average_ranks_sorted,
    rank_normalise,
    split_chains,
)
from chainyard.diagnostics.ess import _geyer_ess, split_ess


def _ar1(rng: np.random.Generator, phi: float, shape: tuple[int, int]) -> np.ndarray:
    e = rng.standard_normal(shape)
    e[:, 0] /= math.sqrt(1.0 - phi**2)
    return lfilter([1.0], [1.0, -phi], e, axis=1)


def _cases() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(7)
    return {
        "ar1-odd": _ar1(rng, 0.9, (6, 2001)),
        "ar1-many-chains": _ar1(rng, 0.5, (40, 1000)),
        "discrete": rng.integers(0, 5, (4, 1001)).astype(float),
        "discrete-wide": rng.integers(0, 50, (4, 300_000)).astype(float),
        "stuck": np.concatenate([np.full((2, 500), 1.5), rng.standard_normal((2, 500))]),
        "constant": np.ones((3, 10)),
    }


CASES = _cases()


def _same(a: float, b: float) -> bool:
    return a == b or (math.isnan(a) and math.isnan(b))


@pytest.mark.parametrize(
    "values",
    [
        np.random.default_rng(1).integers(0, 3, 400_000).astype(float),  # long runs of ties
        np.random.default_rng(2).integers(0, 10**5, 400_000).astype(float),  # short runs
        np.random.default_rng(3).standard_normal(300_001),  # no ties
        np.concatenate([np.zeros(300_000), np.arange(5.0)]),  # one run longer than a block
        np.array([2.0, 1.0, 2.0]),
    ],
    ids=["3-levels", "1e5-levels", "continuous", "long-run", "tiny"],
)
def test_rank_normalise_equals_scipy_rankdata(values: np.ndarray) -> None:
    """Average ranks (ties included, across block boundaries) and normal scores are bit-for-bit
    those of scipy.stats.rankdata(method="average") and norm.ppf (reference: scipy)."""
    assert values.size < 5 or values.size > 2 * validation.RANK_BLOCK
    ref = stats.rankdata(values, method="average")
    ranks = np.sort(values)
    average_ranks_sorted(ranks)
    assert np.array_equal(ranks, np.sort(ref))
    expected = stats.norm.ppf((ref - 0.375) / (values.size + 0.25))  # Vehtari et al. 2021 eq. 14
    assert np.array_equal(rank_normalise(values), expected)


@pytest.mark.parametrize("name", list(CASES))
def test_blockwise_ess_equals_whole_array(name: str) -> None:
    """split_ess over blocks of chains equals the ESS of the stacked split array."""
    x = CASES[name]
    if name == "constant":
        return
    assert _same(split_ess(x), _geyer_ess(split_chains(x)))


@pytest.mark.parametrize("name", list(CASES))
def test_pooled_summary_equals_the_public_functions(name: str) -> None:
    """pooled_summary gives exactly the values of the one-by-one functions and numpy."""
    x = CASES[name]
    got = pooled_summary(x)
    q = np.quantile(x, [0.05, 0.5, 0.95])
    expected = {
        "mean": float(x.reshape(-1).mean()),
        "sd": float(x.reshape(-1).std(ddof=1)),
        "q05": q[0],
        "q50": q[1],
        "q95": q[2],
        "ess_bulk": ess_bulk(x),
        "ess_tail": ess_tail(x),
        "ess_mean": ess_mean(x),
        "ess_q05": ess_quantile(x, 0.05),
        "ess_q95": ess_quantile(x, 0.95),
        "mcse_mean": mcse_mean(x),
        "mcse_q05": mcse_quantile(x, 0.05),
        "mcse_q95": mcse_quantile(x, 0.95),
    }
    for key, value in expected.items():
        assert _same(got[key], float(value)), (key, got[key], value)


def test_pooled_summary_overwrite_reuses_the_buffers() -> None:
    """With overwrite=True the input is reused (it ends as normal scores) and work is reused."""
    x = CASES["ar1-odd"].copy()
    ref = pooled_summary(x)
    work = np.empty(x.size)
    got = pooled_summary(x, work, overwrite=True)
    assert got == ref
    half = x.shape[1] // 2
    assert np.all(np.isinf(x[:, half]))  # middle draw left out of the split ranking
    scores = np.concatenate([x[:, :half], x[:, -half:]], axis=None)
    assert abs(scores.mean()) < 1e-12  # normal scores of ranks are symmetric about 0


def test_mcse_quantile_of_a_constant_indicator_is_nan() -> None:
    """When the quantile indicator is constant its ESS is undefined and the MCSE is nan."""
    y = np.ones((2, 100))
    y[0, 0] = 0.0  # the 95 % quantile is 1, so every draw is <= it: a constant indicator
    assert math.isnan(ess_quantile(y, 0.95))
    assert math.isnan(mcse_quantile(y, 0.95))
