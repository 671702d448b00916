"""What a new user tripped on in a workflow (issue 24), under real snakemake.

A config without the ``chainyard:`` section is one line (exit 2), and a failing job's one-line
cause reaches the terminal and ``results/logs/RUN/STEP.failure.json`` (removed once the job
succeeds).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import yaml

from tests.workflow.conftest import FAST_MODEL, gauss_run, make_workflow, snakemake

pytestmark = pytest.mark.slow

BROKEN_MODEL = """
def log_prob(theta, data):
    raise ValueError("decay rate must be positive")
"""

TARGET = "results/gauss/draws/replica-0.zarr"
FAILURE = Path("results/logs/gauss/sample-replica-0.failure.json")


def test_config_without_chainyard_section_is_one_line(tmp_path: Path) -> None:
    """`runs:` at the top level (no `chainyard:`): one line naming what was found, exit 2,
    instead of the whole schema."""
    folder = make_workflow(tmp_path, {"gauss": gauss_run(steps=100, replicas=1)})
    (folder / "config" / "config.yaml").write_text(
        yaml.safe_dump({"runs": {"gauss": gauss_run(steps=100, replicas=1)}})
    )
    res = snakemake(folder, "-n", "--cores", "1")
    assert res.returncode == 2, res.stdout + res.stderr
    assert res.stderr.strip().splitlines() == [
        "chainyard: error: config: no 'chainyard:' section (found: runs); put the workflow "
        "settings under it, e.g. chainyard: {runs: {kiln: config/runs/kiln.yaml}}"
    ]
    assert len(res.stdout.splitlines()) < 5, res.stdout


def test_failing_job_cause_reaches_terminal_and_failure_file(tmp_path: Path) -> None:
    """A model that raises: the terminal shows the one-line cause (run, replica, error, log),
    the failure file holds run, replica, exit status 3 and the cause; after the model is fixed
    the job succeeds and the file is gone."""
    folder = make_workflow(
        tmp_path,
        {"gauss": gauss_run(steps=100, replicas=1)},
        models={"gauss.py": BROKEN_MODEL},
        sample_retries=0,
    )
    res = snakemake(folder, "--cores", "1", TARGET)
    assert res.returncode != 0
    mine = [line for line in res.stderr.splitlines() if line.startswith("chainyard: error:")]
    assert len(mine) == 1, res.stderr
    assert mine[0].startswith(
        "chainyard: error: sample job failed (run gauss, replica 0): model.log_prob "
        "(vectorized) raised ValueError: decay rate must be positive"
    )
    assert mine[0].endswith("; log: results/logs/gauss/sample-replica-0.log")
    note = json.loads((folder / FAILURE).read_text())
    assert {k: note[k] for k in ("run", "replica", "step", "exit_code")} == {
        "run": "gauss", "replica": 0, "step": "sample", "exit_code": 3,
    }
    assert note["reason"].startswith("model.log_prob (vectorized) raised ValueError: decay")
    (folder / "models" / "gauss.py").write_text(FAST_MODEL)
    res = snakemake(folder, "--cores", "1", TARGET)
    assert res.returncode == 0, res.stdout + res.stderr
    assert not (folder / FAILURE).exists()
