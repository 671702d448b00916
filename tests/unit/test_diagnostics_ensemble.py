"""Ensemble-to-chains helpers and acceptance diagnostics."""

from __future__ import annotations

import json

import numpy as np
import pytest

from chainyard.diagnostics import acceptance_report, ensemble_to_chains, rhat


def test_walker_mean_mode_gives_one_chain_per_replica() -> None:
    """walker_mean: shape (replicas, shortest steps), last steps kept, values are walker means."""
    rng = np.random.default_rng(0)
    reps = [rng.standard_normal((100, 8)), rng.standard_normal((120, 6))]
    chains = ensemble_to_chains(reps)
    assert chains.shape == (2, 100)
    np.testing.assert_allclose(chains[1], reps[1][20:].mean(axis=1))


def test_walkers_mode_stacks_all_walkers() -> None:
    """walkers: every walker of every replica is a chain."""
    rng = np.random.default_rng(1)
    reps = [rng.standard_normal((50, 4)), rng.standard_normal((50, 3))]
    chains = ensemble_to_chains(reps, mode="walkers")
    assert chains.shape == (7, 50)
    np.testing.assert_array_equal(chains[4], reps[1][:, 0])


def test_shifted_replica_detected_by_walker_mean_rhat() -> None:
    """A replica displaced by 1 posterior sd gives R-hat > 1.01; agreeing replicas do not."""
    rng = np.random.default_rng(2)
    good = [rng.standard_normal((2_000, 16)) for _ in range(4)]
    assert rhat(ensemble_to_chains(good)) < 1.01  # Vehtari et al. 2021 threshold
    bad = [*good[:3], good[3] + 1.0]
    assert rhat(ensemble_to_chains(bad)) > 1.01


def test_ensemble_inputs_validated() -> None:
    """Empty input, wrong shape, NaN and unknown mode raise ValueError."""
    with pytest.raises(ValueError):
        ensemble_to_chains([])
    with pytest.raises(ValueError):
        ensemble_to_chains([np.zeros(10)])
    with pytest.raises(ValueError):
        ensemble_to_chains([np.full((10, 2), np.nan)])
    with pytest.raises(ValueError):
        ensemble_to_chains([np.zeros((10, 2))], mode="pooled")  # type: ignore[arg-type]


def test_acceptance_report_flags_stuck_walker_and_band() -> None:
    """A walker with ~2% acceptance among ~30% walkers is flagged; the mean is not."""
    rng = np.random.default_rng(3)
    accepted = rng.random((2_000, 24)) < 0.3
    accepted[:, 5] = rng.random(2_000) < 0.02
    report = acceptance_report(accepted)
    assert report.stuck_walkers == (5,)
    assert report.in_band  # ensemble-move floor 0.05: common practice, no source
    assert not report.ok
    assert report.per_walker[5] == pytest.approx(accepted[:, 5].mean())
    json.dumps(report.to_dict())


def test_acceptance_report_no_false_alarm_on_short_run() -> None:
    """Binomial noise on a 30-step run does not flag healthy walkers."""
    rng = np.random.default_rng(4)
    report = acceptance_report(rng.random((30, 64)) < 0.3)
    assert report.stuck_walkers == ()


def test_acceptance_out_of_band_and_all_rejected() -> None:
    """Mean acceptance under the ensemble floor is flagged; zero acceptance flags all walkers."""
    rng = np.random.default_rng(5)
    low = acceptance_report(rng.random((500, 10)) < 0.02)
    assert not low.in_band and "is outside 0.05-1: the walkers barely move" in low.messages[0]
    none = acceptance_report(np.zeros((100, 4), dtype=bool))
    assert none.stuck_walkers == (0, 1, 2, 3)


def test_acceptance_rejects_bad_input() -> None:
    """Non-2-D or non-boolean input raises ValueError."""
    with pytest.raises(ValueError):
        acceptance_report(np.ones(5, dtype=bool))
    with pytest.raises(ValueError):
        acceptance_report(np.full((3, 2), 0.5))


def test_acceptance_band_depends_on_move_and_dimension() -> None:
    """Stretch runs accepting 0.7 are not flagged; a Gaussian move accepting 0.97 is.

    Gaussian random walk: optimum 0.234 for large dimension (Roberts, Gelman and Gilks 1997)
    and ~0.44 in 1-D (Roberts and Rosenthal 2001), efficient roughly 0.15-0.5 (from memory).
    """
    from chainyard.diagnostics.acceptance import acceptance_band

    rng = np.random.default_rng(6)
    healthy_stretch = rng.random((1_000, 32)) < 0.7
    assert acceptance_report(healthy_stretch, acceptance_band(["stretch"], 4)).messages == ()
    tiny_steps = rng.random((1_000, 32)) < 0.97
    rep = acceptance_report(tiny_steps, acceptance_band(["gaussian"], 4))
    assert not rep.in_band and "proposals too small" in rep.messages[0]
    assert acceptance_band(["gaussian"], 10) == (0.15, 0.5)
    assert acceptance_band(["stretch", "gaussian"], 10) == (0.05, 1.0)
