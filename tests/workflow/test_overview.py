"""The cross-run overview: row contents from a diagnostics record, failed runs first."""

from __future__ import annotations

import csv
from pathlib import Path

from chainyard.workflow.overview import OVERVIEW_COLUMNS, overview_row, write_runs_csv


def _record(run: str, ok: bool, rhat: dict[str, float], ess: dict[str, float]) -> dict:
    failures = [] if ok else ["ess_bulk 120 < 400"]
    return {
        "run": run,
        "params": {p: {"rhat": rhat[p], "ess_bulk": ess[p]} for p in rhat},
        "verdict": {"ok": ok, "params": {"a": {"failures": failures}}},
        "acceptance_warnings": [],
        "selection": {"steps_used": 1000, "first_kept": 100, "every": 1},
        "steps": 900,
        "replicas": 2,
        "walkers": 8,
    }


def test_rows_and_order(tmp_path: Path) -> None:
    """Worst R-hat is the largest, lowest ESS the smallest (with their parameter); runs
    that did not converge come first, the worst R-hat first among them."""
    rows = [
        overview_row(_record("fine", True, {"a": 1.001, "b": 1.004}, {"a": 900, "b": 700}), []),
        overview_row(_record("bad", False, {"a": 1.05, "b": 1.2}, {"a": 120, "b": 300}), []),
        overview_row(_record("worse", False, {"a": 1.9, "b": 1.0}, {"a": 50, "b": 80}), []),
    ]
    out = tmp_path / "runs.csv"
    write_runs_csv(rows, out)
    with open(out, newline="") as f:
        table = list(csv.DictReader(f))
    assert list(table[0]) == list(OVERVIEW_COLUMNS)
    assert [r["run"] for r in table] == ["worse", "bad", "fine"]
    fine = table[2]
    assert (fine["verdict"], fine["worst_rhat"], fine["worst_rhat_parameter"]) == (
        "converged", "1.004", "b"
    )
    assert (fine["lowest_ess"], fine["lowest_ess_parameter"]) == ("700", "b")
    assert table[1]["warnings"] == "a: ess_bulk 120 < 400"
    assert (fine["steps"], fine["kept_steps"], fine["replicas"]) == ("1000", "900", "2")
