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
    that did not meet their targets come first, the worst R-hat first among them."""
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
        "targets met", "1.004", "b"
    )
    assert (fine["lowest_ess"], fine["lowest_ess_parameter"]) == ("700", "b")
    assert table[1]["warnings"] == "a did not meet its targets: ess_bulk 120 < 400."
    assert (fine["steps"], fine["kept_steps"], fine["replicas"]) == ("1000", "900", "2")


def test_warnings_are_sentences_without_reprs() -> None:
    """Failures, acceptance warnings and stuck walkers read as sentences: no Python dicts or
    lists, chains named as chains for the chain kinds, nothing said twice."""
    record = _record("r", False, {"a": 1.2}, {"a": 100})
    record["verdict"]["stuck_walkers"] = {"1": [6, 19, 20], "2": [4]}
    record["acceptance_warnings"] = ["replica 2: 1 of 8 walkers look stuck: 4"]
    text = overview_row(record, [])["warnings"]
    assert "{" not in text and "[" not in text and "'" not in text
    assert "Replica 1: walkers 6, 19, 20 are stuck" in text
    assert text.count("Replica 2:") == 1  # the acceptance warning already names walker 4
    record["sampler_kind"] = "metropolis_hastings"
    assert "Replica 1: chains 6, 19, 20 are stuck" in overview_row(record, [])["warnings"]


def test_opening_page_at_500_runs(tmp_path: Path) -> None:
    """At 500 runs the page renders without docutils complaints (every line under its
    length limit), holds the figure across runs as an embedded PNG above the table, keeps
    the table in its own scrolling box with a fixed header, and lifts the narrow column
    that put the table under the workflow graph."""
    from docutils.core import publish_parts

    from chainyard.workflow.overview import write_overview_rst
    from chainyard.workflow.overview_figure import overview_png

    rows = []
    for i in range(500):
        ok = i % 10 != 0
        rhat = 1.002 if ok else 1.0 + 0.01 * (i % 37)
        record = _record(f"star_{i:03d}", ok, {"a": rhat}, {"a": 900 if ok else 150})
        record["params"]["a"]["rhat_nested"] = rhat
        record["targets"] = {"max_rhat": None, "max_nested_rhat": 1.01, "min_ess_bulk": 400}
        rows.append(overview_row(record, []))
    png = overview_png(rows)
    assert png.startswith(b"\x89PNG") and len(png) < 400_000
    page = tmp_path / "overview.rst"
    write_overview_rst(rows, "results", page, png)
    html = publish_parts(page.read_text(), writer="html")["html_body"]
    assert "system-message" not in html
    assert html.index("data:image/png;base64,") < html.index("<table")
    assert html.count("<tr>") == 501 and html.count(">star_") == 500
    assert 'class="chainyard-runs"' in html and "position: sticky" in html
    assert "div.prose:has(#chainyard-overview) { max-width: none; }" in html
