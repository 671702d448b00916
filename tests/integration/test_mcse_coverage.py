"""Calibration of chainyard's MCSE on real sampled runs (not just synthetic chains)."""

from __future__ import annotations

import io
from pathlib import Path

import pytest

import chainyard
from chainyard.analysis import diagnose
from chainyard.analysis.view import StoreWindow

MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * np.sum(theta * theta, axis=1)
"""

RUNS = 50


@pytest.mark.slow
def test_mcse_interval_covers_true_mean_about_90_percent(tmp_path: Path) -> None:
    """Over 50 seeds, mean +- 1.645 MCSE covers the true mean 0, and sd +- 1.645 mcse_sd the
    true sd 1, in about 90% of runs.

    Analytic: the target is N(0, I), so the true mean is 0 and the true sd 1. Tolerance:
    binomial sd of the coverage over 50 runs is sqrt(0.9 * 0.1 / 50) = 0.042; we accept
    0.74-1.0 (about 4 sd below; a badly optimistic MCSE gives far lower coverage).
    """
    (tmp_path / "model.py").write_text(MODEL)
    covered = covered_sd = 0
    for seed in range(RUNS):
        cfg = chainyard.parse_config(
            {
                "model": {"log_prob": "model.py:log_prob", "vectorized": True},
                "parameters": [
                    {"name": "x", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
                    {"name": "y", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
                ],
                "sampler": {"walkers": 16, "steps": 1500},
                "storage": {"fsync": False},
                "seed": 1000 + seed,
            },
            base_dir=tmp_path,
        )
        store = chainyard.sample(
            cfg, tmp_path / f"s{seed}.zarr", progress="off", stream=io.StringIO()
        )
        d = diagnose([StoreWindow(store, 200)])["params"]["x"]
        covered += abs(d["mean"]) < 1.645 * d["mcse_mean"]
        covered_sd += abs(d["sd"] - 1.0) < 1.645 * d["mcse_sd"]
    assert 0.74 <= covered / RUNS <= 1.0, covered / RUNS
    assert 0.74 <= covered_sd / RUNS <= 1.0, covered_sd / RUNS
