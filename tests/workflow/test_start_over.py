"""Sampling after a change of the model file or a sampling setting, under real snakemake.

The job finds its resumable store made with other settings, logs "starting over", samples
afresh and publishes draws equal to a fresh workflow's (bitwise), and a further run has nothing
to do. Uses the README's Snakefile lines (``tests.workflow.conftest.SNAKEFILE``).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.conftest import assert_same_store
from tests.workflow.conftest import gauss_run, make_workflow, snakemake, write_config

pytestmark = pytest.mark.slow

TARGET = "results/gauss/draws/replica-0.zarr"
LOG = Path("results/logs/gauss/sample-replica-0.log")

#: the same density as the conftest's model, written differently (new file content)
CHANGED_MODEL = """
import numpy as np

def log_prob(theta, data):
    # edited: same density, new file content
    return -0.5 * np.einsum("ij,ij->i", theta, theta)
"""


def _run(folder: Path) -> str:
    res = snakemake(folder, "--cores", "2", TARGET)
    assert res.returncode == 0, res.stdout + res.stderr
    return res.stdout + res.stderr


def _fresh(folder: Path, run: dict, model: str | None = None) -> Path:
    """The same workflow made from scratch, its sampling output."""
    models = {"gauss.py": model} if model else None
    wf = make_workflow(folder, {"gauss": run}, models)
    _run(wf)
    return wf / TARGET


@pytest.mark.parametrize("change", ["model file", "walkers"])
def test_change_starts_over_and_completes(tmp_path: Path, change: str) -> None:
    """After the change the job starts over, completes, equals a fresh run; a rerun is idle."""
    run = gauss_run(steps=600, replicas=1)
    wf = make_workflow(tmp_path / "wf", {"gauss": run})
    _run(wf)
    if change == "model file":
        (wf / "models" / "gauss.py").write_text(CHANGED_MODEL)
        fresh = _fresh(tmp_path / "fresh", run, CHANGED_MODEL)
    else:
        run = gauss_run(steps=600, replicas=1, sampler={"walkers": 20, "steps": 600})
        write_config(wf, {"gauss": run})
        fresh = _fresh(tmp_path / "fresh", run)
    _run(wf)
    log = (wf / LOG).read_text()
    assert "starting over" in log, log
    assert "Use --restart" not in log, log  # the workflow starts over by itself
    assert "is held" not in log, log
    assert_same_store(wf / TARGET, fresh)
    again = snakemake(wf, "--cores", "2", TARGET)
    assert again.returncode == 0, again.stdout + again.stderr
    assert "Nothing to be done" in again.stdout + again.stderr
