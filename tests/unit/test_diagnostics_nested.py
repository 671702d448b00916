"""Nested R-hat (Margossian et al. 2024) against hand arithmetic and arviz-stats, the pooled
(bounded-memory) path of diagnose against the one-call function, and pooled_summary's mcse_sd
and NaN refusal."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from arviz_stats.sampling_diagnostics import rhat_nested as arviz_rhat_nested

import chainyard
from chainyard.analysis.diagnose import diagnose, diagnose_arrays
from chainyard.diagnostics import mcse_sd, pooled_summary
from chainyard.diagnostics.nested import nested_rhat, nested_rhat_of_split
from tests.conftest import base_config, write_run


def _stack(reps: list[np.ndarray]) -> np.ndarray:
    """(replicas, steps, walkers) -> (replicas * walkers, steps): walkers of replica k in order."""
    return np.concatenate([r.T for r in reps])


def test_nested_rhat_equations_by_hand() -> None:
    """Eqs. 4-8 of Margossian et al. (2024) on a 2 x 2 x 4 array, computed by hand.

    Chains (superchain 0) [1,2,3,4], [2,3,4,5]; (superchain 1) [4,5,6,7], [6,7,8,9].
    Chain means 2.5, 3.5, 5.5, 7.5; chain variances (ddof 1) all 5/3.
    Superchain means 3 and 6.5, overall 4.75; B_nu = (1.75^2 + 1.75^2) / 1 = 6.125.
    Btilde = var(2.5, 3.5) = 0.5 and var(5.5, 7.5) = 2; Wtilde = 5/3 and 5/3;
    W_nu = ((0.5 + 5/3) + (2 + 5/3)) / 2 = 35/12; nested R-hat = sqrt(1 + 6.125 * 12 / 35)
    = sqrt(3.1). arviz-stats (method "identity", no splitting or ranks) agrees.
    """
    x = np.array([[1, 2, 3, 4], [2, 3, 4, 5], [4, 5, 6, 7], [6, 7, 8, 9]], dtype=float)
    expected = math.sqrt(3.1)
    got = nested_rhat_of_split(x.mean(axis=1), x.var(axis=1, ddof=1), 2)
    assert got == pytest.approx(expected, rel=1e-15)
    ref = arviz_rhat_nested(  # reference library, used only in tests
        x, superchain_ids=[0, 0, 1, 1], chain_axis=0, draw_axis=1, method="identity"
    )
    assert float(ref) == pytest.approx(expected, rel=1e-15)


@pytest.mark.parametrize(
    ("replicas", "walkers", "steps", "shift"),
    [(4, 8, 200, 0.0), (4, 8, 201, 0.3), (3, 5, 57, 1.0), (2, 1, 100, 0.2), (4, 32, 64, 0.05)],
)
def test_nested_rhat_equals_arviz_stats(
    replicas: int, walkers: int, steps: int, shift: float
) -> None:
    """nested_rhat equals arviz_stats.rhat_nested(method="rank") (max of bulk and folded,
    split chains) to 1e-12, odd lengths and one walker per replica included."""
    rng = np.random.default_rng(replicas * 100 + steps)
    x = rng.standard_normal((replicas * walkers, steps)).cumsum(axis=1) * 0.1
    x += np.repeat(rng.standard_normal(replicas) * shift, walkers)[:, None]
    ids = np.repeat(np.arange(replicas), walkers)
    ref = arviz_rhat_nested(x, superchain_ids=ids, chain_axis=0, draw_axis=1, method="rank")
    assert nested_rhat(x, replicas) == pytest.approx(float(ref), rel=1e-12, abs=1e-12)


@pytest.mark.parametrize("steps", [300, 301])
def test_diagnose_nested_rhat_equals_the_one_call_function(steps: int) -> None:
    """The bounded-memory path of diagnose (scores reused, column re-read for the folded
    version) gives the same nested R-hat as nested_rhat on the stacked walkers."""
    rng = np.random.default_rng(steps)
    draws = rng.standard_normal((4, steps, 6, 2)).cumsum(axis=1) * 0.2
    draws[2] += 0.3
    result = diagnose_arrays(draws)
    for j, name in enumerate(("x0", "x1")):
        expected = nested_rhat(_stack([draws[r, :, :, j] for r in range(4)]), 4)
        assert result["params"][name]["rhat_nested"] == pytest.approx(expected, rel=1e-12)


def test_one_replica_compares_the_halves() -> None:
    """With one replica nested R-hat compares the run's halves: a drift of 1 sd fails it."""
    rng = np.random.default_rng(3)
    x = rng.standard_normal((16, 400))
    flat = nested_rhat(x, 1)
    x[:, 200:] += 1.0
    assert flat < 1.01 < nested_rhat(x, 1)


def test_healthy_replicas_pass_and_shifted_replica_fails() -> None:
    """iid draws, 4 x 32 x 500: nested R-hat ~ 1 + 1/(2 ESS_r) < 1.01; a replica 0.5 sd off
    fails (the module docstring's derivation: R^2 - 1 ~ offsets^2 / sd^2 = 0.0625 / 4 * ...)."""
    rng = np.random.default_rng(4)
    reps = [rng.standard_normal((500, 32)) for _ in range(4)]
    assert nested_rhat(_stack(reps), 4) < 1.001
    reps[1] = reps[1] + 0.5
    assert nested_rhat(_stack(reps), 4) > 1.01


def test_pooled_summary_mcse_sd_and_non_finite() -> None:
    """pooled_summary's mcse_sd equals mcse_sd (Vehtari et al. 2021 Sec. 4.4, delta method);
    NaN or inf input raises ValueError like the single-value functions."""
    rng = np.random.default_rng(5)
    x = rng.standard_normal((8, 301)).cumsum(axis=1)
    assert pooled_summary(x)["mcse_sd"] == pytest.approx(mcse_sd(x), rel=1e-10)
    for bad in (np.nan, np.inf, -np.inf):
        y = x.copy()
        y[3, 7] = bad
        with pytest.raises(ValueError, match="NaN or infinite"):
            pooled_summary(y)


def test_diagnose_arrays_equals_diagnose_on_stores(tmp_path: Path) -> None:
    """diagnose_arrays on the draws read back from real stores gives diagnose's result dict."""
    cfg = base_config(sampler={"walkers": 8, "steps": 120}, storage={"fsync": False})
    path = write_run(tmp_path, cfg)
    config = chainyard.load_config(path)
    stores = [
        chainyard.sample(config, tmp_path / f"r{r}.zarr", r, progress="off") for r in range(3)
    ]
    from_stores = diagnose(stores)
    draws = np.stack([s.draws() for s in stores])
    accepted = np.stack([s.accepted() for s in stores])
    from_arrays = diagnose_arrays(
        draws,
        config.targets,
        accepted=accepted,
        names=stores[0].param_names,
        move_kinds=[m.kind for m in config.sampler.moves],
    )
    assert from_arrays == from_stores


def test_diagnose_refuses_non_finite_draws_as_damage() -> None:
    """NaN in the draws (which chainyard never stores) is a StoreError naming replica and
    parameter, not a traceback."""
    from chainyard.errors import StoreError

    draws = np.random.default_rng(6).standard_normal((2, 50, 4, 2))
    draws[1, 10, 2, 1] = np.nan
    with pytest.raises(StoreError, match=r"replica 1: parameter x1 holds NaN or infinite draws"):
        diagnose_arrays(draws)
