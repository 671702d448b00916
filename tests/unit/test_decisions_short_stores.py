"""Stores too short for a method give one line naming the minimum and exit 4 (StoreError),
never a traceback: decide burn-in (MSER-5) on 8 steps, diagnose on 3 steps."""

from __future__ import annotations

from pathlib import Path

from tests.conftest import base_config, cli, write_run

MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * np.sum(theta * theta, axis=1)
"""


def _store(tmp_path: Path, steps: int, name: str) -> None:
    cfg = base_config(
        model={"log_prob": "model.py:log_prob", "vectorized": True},
        sampler={"walkers": 8, "steps": steps},
        storage={"fsync": False},
    )
    path = write_run(tmp_path, cfg, MODEL)
    res = cli("sample", str(path), "--out", name, "--progress", "off", cwd=tmp_path)
    assert res.returncode == 0, res.stderr


def test_decide_burn_in_on_8_steps_names_the_minimum(tmp_path: Path) -> None:
    """Default burn-in (MSER-5: at least 4 batches of 5 steps) on 8 steps: exit 4, one line."""
    _store(tmp_path, 8, "r0.zarr")
    res = cli("decide", "burn-in", "r0.zarr", "--out", "b.json", cwd=tmp_path)
    assert res.returncode == 4
    assert res.stderr.strip() == (
        "chainyard: error: cannot decide burn-in on 8 steps: MSER-5 needs at least 4 batches "
        "(20 steps); the trace has 8 steps"
    )
    assert not (tmp_path / "b.json").exists()


def test_diagnose_on_3_steps_names_the_minimum(tmp_path: Path) -> None:
    """diagnose on a 3-step store: split chains need 2 x 2 draws; exit 4, one line."""
    _store(tmp_path, 3, "r0.zarr")
    res = cli("diagnose", "--raw", "r0.zarr", cwd=tmp_path)
    assert res.returncode == 4
    assert res.stderr.strip() == (
        "chainyard: error: diagnose needs at least 4 steps per replica after burn-in "
        "(split-chain R-hat and ESS use two halves of at least 2 steps); the shortest replica "
        "has 3"
    )
