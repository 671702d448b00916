"""Selections under real snakemake: lowering `steps` uses the first N stored steps (recorded,
nothing deleted), and a standalone store of the selected steps is written only on request."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

import chainyard
from tests.workflow.conftest import gauss_run, make_workflow, planned_jobs, snakemake, write_config

pytestmark = pytest.mark.slow


def _run(steps: int) -> dict[str, object]:
    return gauss_run(steps=steps, replicas=2, burn_in={"policy": "fixed", "steps": 100},
                     thinning={"policy": "fixed", "factor": 3})


def test_lowering_steps_uses_the_first_steps(tmp_path: Path) -> None:
    folder = make_workflow(tmp_path, {"gauss": _run(900)})
    res = snakemake(folder, "--cores", "2")
    assert res.returncode == 0, res.stdout + res.stderr
    run = folder / "results" / "gauss"
    store = run / "draws" / "replica-0.zarr"
    before = chainyard.open_store(store).draws()

    write_config(folder, {"gauss": _run(500)})
    res = snakemake(folder, "--cores", "2")
    assert res.returncode == 0, res.stdout + res.stderr
    # stored draws are kept whole ...
    assert np.array_equal(chainyard.open_store(store).draws(), before)
    # ... and the later steps use the first 500, as recorded
    sel = json.loads((run / "decisions" / "selection.json").read_text())
    assert (sel["steps_used"], sel["steps_stored"], sel["first_kept"], sel["every"]) == (
        500, 900, 100, 3
    )
    assert sel["kept_per_replica"] == len(range(100, 500, 3)) == 134
    diag = json.loads((run / "diagnostics.json").read_text())
    pooled = np.concatenate([
        chainyard.open_store(run / "draws" / f"replica-{r}.zarr").column("x")[100:500:3]
        .reshape(-1) for r in range(2)
    ])
    assert diag["params"]["x"]["mean"] == pytest.approx(float(pooled.mean()), rel=1e-9)
    log = (folder / "results/logs/gauss/sample-replica-0.log").read_text()
    assert "later steps use the first 500" in log and "no stored draws are deleted" in log
    decide_log = (folder / "results/logs/gauss/analyse.log").read_text()
    assert "selection: steps 100 to 500 (of 900 stored; the config asks for 500)" in decide_log

    # raising steps back within what is stored samples nothing new and uses all 900
    write_config(folder, {"gauss": _run(900)})
    res = snakemake(folder, "--cores", "2")
    assert res.returncode == 0, res.stdout + res.stderr
    assert np.array_equal(chainyard.open_store(store).draws(), before)
    sel = json.loads((run / "decisions" / "selection.json").read_text())
    assert (sel["steps_used"], sel["steps_stored"]) == (900, 900)

    # a standalone store of the selected steps only on request, equal to the selection
    assert not (run / "standalone").exists()
    target = "results/gauss/standalone/replica-1.zarr"
    assert planned_jobs(folder, target) == {"chainyard_standalone": 1}
    res = snakemake(folder, "--cores", "1", target)
    assert res.returncode == 0, res.stdout + res.stderr
    alone = chainyard.open_store(folder / target)
    source = chainyard.open_store(run / "draws" / "replica-1.zarr")
    assert np.array_equal(alone.draws(), source.draws()[100:900:3])
    assert np.array_equal(alone.log_prob(), source.log_prob()[100:900:3])
    verify = chainyard.verify(folder / target)
    assert verify.ok, verify
