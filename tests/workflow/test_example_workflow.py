"""The shipped example workflow, end to end from a clean copy, with --cores 2."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

from tests.workflow.conftest import snakemake

EXAMPLE = Path(__file__).parents[2] / "example_workflow"


@pytest.mark.slow
def test_example_workflow_end_to_end(tmp_path: Path) -> None:
    """Both runs complete; cooling converges and recovers the truth, mirror_source is flagged.

    Truth: data/truth.json written by the seeded data generator (scripts/make_data.py).
    """
    folder = tmp_path / "example"
    shutil.copytree(EXAMPLE, folder, ignore=shutil.ignore_patterns("results", ".snakemake",
                                                                   "report.html"))
    res = snakemake(folder, "--cores", "2")
    assert res.returncode == 0, res.stdout + res.stderr
    cooling = json.loads((folder / "results/cooling/diagnostics.json").read_text())
    mirror = json.loads((folder / "results/mirror_source/diagnostics.json").read_text())
    assert cooling["verdict"]["ok"] is True
    assert mirror["verdict"]["ok"] is False
    assert mirror["params"]["x_src"]["rhat"] > 1.1
    truth = json.loads((folder / "data/truth.json").read_text())["runs"]["cooling"]
    for name, value in truth["parameters"].items():
        est = cooling["params"][name]
        assert abs(est["mean"] - value) < 3 * est["sd"], (name, est["mean"], value)
    report = snakemake(folder, "--report", "report.html")
    assert report.returncode == 0, report.stdout + report.stderr
    assert (folder / "report.html").stat().st_size > 100_000
    again = snakemake(folder, "--cores", "2")
    assert "Nothing to be done" in again.stdout + again.stderr
