"""Run until targets: exact extensions, each check recorded, budget respected."""

from __future__ import annotations

import json
from pathlib import Path

import chainyard
from tests.conftest import assert_same_store, base_config, cli, write_run

CHECKS = "target_checks.json"

MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * np.sum(theta * theta, axis=1)
"""


def _cfg(**targets: object) -> dict[str, object]:
    return base_config(
        model={"log_prob": "model.py:log_prob", "vectorized": True},
        sampler={"walkers": 16, "steps": 500},
        storage={"fsync": False},
        targets={"min_ess_bulk": 400, "min_ess_tail": 400, "max_rhat": 1.05, **targets},
        extend_until_targets={"check_every": 500, "max_steps": 8000},
    )


def test_extends_until_met_and_equals_direct_run(tmp_path: Path) -> None:
    """Checks extend 500 steps at a time until met; the store equals a direct run."""
    path = write_run(tmp_path, _cfg(), MODEL)
    res = cli("sample", str(path), "--out", "u.zarr", "--until-targets", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    record = json.loads((tmp_path / "u.zarr" / "target_checks.json").read_text())
    checks = record["checks"]
    assert len(checks) >= 2 and checks[-1]["ok"] and not checks[0]["ok"]
    assert [c["steps"] for c in checks] == [500 * (i + 1) for i in range(len(checks))]
    total = chainyard.open_store(tmp_path / "u.zarr").steps_done
    assert total == checks[-1]["steps"] < 8000
    res = cli("sample", str(path), "--out", "d.zarr", "--steps", str(total), cwd=tmp_path)
    assert res.returncode == 0
    assert_same_store(tmp_path / "u.zarr", tmp_path / "d.zarr")


def test_budget_spent_exits_1(tmp_path: Path) -> None:
    """Unreachable targets: the run stops at max_steps, exits 1 and says so."""
    cfg = _cfg(min_ess_bulk=1e12)
    cfg["extend_until_targets"] = {"check_every": 1000, "max_steps": 2500}
    path = write_run(tmp_path, cfg, MODEL)
    res = cli("sample", str(path), "--out", "u.zarr", "--until-targets", cwd=tmp_path)
    assert res.returncode == 1
    assert res.stderr.strip().splitlines()[-1] == (  # progress lines come first
        "chainyard: error: targets not met after 2,500 steps (budget spent); "
        "see u.zarr/target_checks.json"
    )
    checks = json.loads((tmp_path / "u.zarr" / "target_checks.json").read_text())["checks"]
    assert [c["steps"] for c in checks] == [500, 1500, 2500]
    assert any("ess_bulk" in line for line in checks[-1]["lines"])


def test_all_replicas_extended_and_judged_together(tmp_path: Path) -> None:
    """--out r{replica}.zarr with replicas: 3 extends every replica in turn; each check is the
    run-level verdict of diagnose across the three (nested R-hat over replicas), recorded in
    every store, and the last one equals diagnose run again on the final stores."""
    from chainyard.analysis.until import check_run

    cfg = _cfg()
    cfg["replicas"] = 3
    cfg["targets"] = {"min_ess_bulk": 2000, "min_ess_tail": 2000}
    cfg["extend_until_targets"] = {"check_every": 500, "max_steps": 6000}
    path = write_run(tmp_path, cfg, MODEL)
    res = cli("sample", str(path), "--out", "r{replica}.zarr", "--until-targets", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    records = [json.loads((tmp_path / f"r{r}.zarr" / CHECKS).read_text()) for r in range(3)]
    assert records[0] == records[1] == records[2]  # one record of the run, in every replica
    checks = records[0]["checks"]
    assert records[0]["stores"] == [f"r{r}.zarr" for r in range(3)]
    assert checks[-1]["ok"] and not checks[0]["ok"] and checks[-1]["replicas"] == [0, 1, 2]
    assert checks[0]["more_steps"] is not None and checks[0]["checks"]["precision"] is False
    stores = [chainyard.open_store(tmp_path / f"r{r}.zarr") for r in range(3)]
    assert {s.steps_done for s in stores} == {checks[-1]["steps"]}
    config = chainyard.load_config(path)
    again = check_run(stores, config)
    assert again["ok"] and again["lines"] == checks[-1]["lines"]


def test_replicas_without_placeholder_is_a_usage_error(tmp_path: Path) -> None:
    """replicas: 2 with a plain --out: exit 2, one line naming {replica}; nothing written."""
    cfg = _cfg()
    cfg["replicas"] = 2
    path = write_run(tmp_path, cfg, MODEL)
    res = cli("sample", str(path), "--out", "u.zarr", "--until-targets", cwd=tmp_path)
    assert res.returncode == 2
    assert res.stderr.strip() == (
        "chainyard: error: --until-targets judges the whole run (2 replicas): give --out with "
        "{replica} (e.g. --out run/r{replica}.zarr) so that every replica is extended and "
        "diagnosed together"
    )
    assert not (tmp_path / "u.zarr").exists()
