"""The rule library runs every sampler kind with no change but the run config (real
snakemake, --cores 2): outputs, diagnostics basis and records exist for each."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tests.workflow.conftest import FAST_MODEL, gauss_run, make_workflow, snakemake

pytestmark = pytest.mark.slow

KERNEL = """
import numpy as np

def step(state, rng, data):
    return 0.5 * state + np.sqrt(0.75) * rng.standard_normal(state.shape)
"""


def test_every_kind_through_the_rules(tmp_path: Path) -> None:
    runs = {
        "mh": gauss_run(
            replicas=1,
            sampler={"kind": "metropolis_hastings", "chains": 4, "steps": 2000, "proposal_sd": 1.5},
        ),
        "gibbs": gauss_run(
            replicas=1,
            sampler={
                "kind": "kernel",
                "kernel": "models/kernel.py:step",
                "chains": 4,
                "steps": 1000,
            },
        ),
        # f = exp(-|x|^2 / 2) against g = N(0, 2^2) per parameter: log M = 2 (log 2 +
        # log(2 pi) / 2) ~ 3.2242 for x; y starts uniform but the envelope is normal for both
        "exact": gauss_run(
            replicas=1,
            sampler={
                "kind": "accept_reject",
                "chains": 4,
                "draws": 1000,
                "log_bound": 3.3,
                "envelope": [{"normal": {"loc": 0.0, "scale": 2.0}}] * 2,
            },
        ),
    }
    folder = make_workflow(tmp_path, runs, {"gauss.py": FAST_MODEL, "kernel.py": KERNEL})
    res = snakemake(folder, "--cores", "2")
    assert res.returncode == 0, res.stdout[-3000:] + res.stderr[-3000:]
    for name, kind in (
        ("mh", "metropolis_hastings"),
        ("gibbs", "kernel"),
        ("exact", "accept_reject"),
    ):
        run = folder / "results" / name
        for rel in (
            "summary.csv",
            "diagnostics.json",
            "plots/traces.png",
            "decisions/burn_in.json",
        ):
            assert (run / rel).is_file(), (name, rel)
        diag = json.loads((run / "diagnostics.json").read_text())
        assert diag["sampler_kind"] == kind and diag["basis"]
        if kind == "accept_reject":
            assert diag["accept_reject"]["draws"] > 0
