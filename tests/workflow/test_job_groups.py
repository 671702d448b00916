"""The shipped many-runs profile (Snakemake job groups) with real snakemake: the plan bundles
the sampling jobs of several runs into one group job and the runs' analysis jobs into
another; run locally (where Snakemake executes group members one by one: "Group jobs:
inactive (local execution)"), the workflow completes, the draws equal a direct
`chainyard.sample` of the same run config, and a rerun has nothing to do."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

import chainyard
from chainyard.config import parse_config
from tests.conftest import assert_same_store
from tests.workflow.conftest import gauss_run, make_workflow, snakemake

pytestmark = pytest.mark.slow

PROFILE = Path(__file__).parents[2] / "example_workflow" / "profiles" / "many-runs"


def test_many_runs_profile_groups_jobs(tmp_path: Path) -> None:
    runs = {name: gauss_run(steps=300, replicas=2, seed=seed)
            for name, seed in (("first", 11), ("second", 12))}
    folder = make_workflow(tmp_path / "wf", runs)
    shutil.copytree(PROFILE, folder / "profiles" / "many-runs")
    plan = snakemake(folder, "--profile", "profiles/many-runs", "-n")
    text = plan.stdout + plan.stderr
    assert plan.returncode == 0, text
    # 4 sampling jobs fit one group job (8 components); the 2 runs' analyse jobs another
    assert text.count("Group job sampling") == 1 and text.count("Group job analysis") == 1
    res = snakemake(folder, "--profile", "profiles/many-runs")
    out = res.stdout + res.stderr
    assert res.returncode == 0, out
    for name in runs:
        assert (folder / "results" / name / "plots" / "traces.png").is_file()
    assert (folder / "results" / "runs.csv").read_text().count("\n") == 3
    # the draws do not depend on the grouping: equal to a direct run of the same config
    cwd = os.getcwd()
    os.chdir(folder)
    try:
        config = parse_config(runs["second"], base_dir=folder, source="second")
        chainyard.sample(config, tmp_path / "direct.zarr", 1, progress="off")
    finally:
        os.chdir(cwd)
    assert_same_store(folder / "results/second/draws/replica-1.zarr", tmp_path / "direct.zarr")
    again = snakemake(folder, "--profile", "profiles/many-runs")
    assert "Nothing to be done" in again.stdout + again.stderr
