"""The cross-run overview: one row per run (``RESULTS/runs.csv``) and the report's opening page.

Rows are ordered failed runs first (worst R-hat first among them), so the few runs that need
attention among hundreds are at the top. The opening page of ``snakemake --report`` is the
same table (reStructuredText, rendered by Snakemake), each run linking to its plots and tables.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Sequence
from datetime import datetime
from pathlib import Path
from typing import Any

__all__ = ["OVERVIEW_COLUMNS", "overview_row", "write_overview_rst", "write_runs_csv"]

#: columns of runs.csv, in order
OVERVIEW_COLUMNS = (
    "run",
    "verdict",
    "worst_rhat",
    "worst_rhat_parameter",
    "lowest_ess",
    "lowest_ess_parameter",
    "steps",
    "kept_steps",
    "replicas",
    "walkers",
    "sampling_seconds",
    "warnings",
)

#: the plots and tables of a run that the report's overview links to
RUN_ITEMS = (
    ("summary", "summary.csv"),
    ("diagnostics", "diagnostics.txt"),
    ("traces", "plots/traces.png"),
    ("tau", "plots/tau.png"),
    ("pairs", "plots/pairs.png"),
    ("acceptance", "plots/acceptance.png"),
)


def _seconds(stores: Sequence[Any]) -> float:
    """Time spent sampling, summed over replicas and segments (from the stores' history)."""
    total = 0.0
    for s in stores:
        for seg in s.commit_record.get("segments") or []:
            a, b = seg.get("started_utc"), seg.get("ended_utc")
            if a and b:
                t0 = datetime.fromisoformat(str(a).replace("Z", "+00:00"))
                t1 = datetime.fromisoformat(str(b).replace("Z", "+00:00"))
                total += max(0.0, (t1 - t0).total_seconds())
    return total


def _worst(params: dict[str, Any], key: str, pick: Any) -> tuple[float | None, str]:
    found = [(float(v[key]), k) for k, v in params.items() if _finite(v.get(key))]
    if not found:
        return None, ""
    value, name = pick(found)
    return value, name


def _finite(x: Any) -> bool:
    return isinstance(x, int | float) and math.isfinite(float(x))


def overview_row(diagnostics: dict[str, Any], stores: Sequence[Any]) -> dict[str, Any]:
    """One row of runs.csv from a run's diagnostics record and its (opened) replica stores."""
    params = diagnostics.get("params") or {}
    verdict = diagnostics.get("verdict") or {}
    rhat, rhat_name = _worst(params, "rhat", max)
    ess, ess_name = _worst(params, "ess_bulk", min)
    warnings = [
        f"{name}: {', '.join(v.get('failures') or [])}"
        for name, v in (verdict.get("params") or {}).items()
        if v.get("failures")
    ]
    warnings += [str(w) for w in diagnostics.get("acceptance_warnings") or []]
    stuck = verdict.get("stuck_walkers") or {}
    if stuck:
        warnings.append(f"stuck walkers: {stuck}")
    minority = verdict.get("minority_walkers") or {}
    if minority:
        warnings.append(f"walkers in a minority region: {minority}")
    selection = diagnostics.get("selection") or {}
    return {
        "run": diagnostics.get("run", ""),
        "verdict": "converged" if verdict.get("ok") else "NOT converged",
        "worst_rhat": None if rhat is None else round(rhat, 4),
        "worst_rhat_parameter": rhat_name,
        "lowest_ess": None if ess is None else round(ess),
        "lowest_ess_parameter": ess_name,
        "steps": selection.get("steps_used", ""),
        "kept_steps": diagnostics.get("steps", ""),
        "replicas": diagnostics.get("replicas", len(stores)),
        "walkers": diagnostics.get("walkers", ""),
        "sampling_seconds": round(_seconds(stores), 1),
        "warnings": "; ".join(warnings),
    }


def _order(rows: Sequence[dict[str, Any]]) -> list[dict[str, Any]]:
    """Not-converged runs first, then by worst R-hat (largest first), then by name."""
    return sorted(
        rows,
        key=lambda r: (
            r["verdict"] == "converged",
            -(r["worst_rhat"] if r["worst_rhat"] is not None else math.inf),
            r["run"],
        ),
    )


def write_runs_csv(rows: Sequence[dict[str, Any]], path: str | Path) -> list[dict[str, Any]]:
    """Write runs.csv (failed runs first); returns the rows in that order."""
    ordered = _order(rows)
    with open(path, "w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=list(OVERVIEW_COLUMNS))
        w.writeheader()
        for r in ordered:
            w.writerow({k: "" if r[k] is None else r[k] for k in OVERVIEW_COLUMNS})
    return ordered


def _cell(text: Any) -> str:
    return str("" if text is None else text).replace("|", "/").replace("`", "'")


def write_overview_rst(
    rows: Sequence[dict[str, Any]], results: str, path: str | Path
) -> None:
    """The report's opening page: the overview table, each run linking to its items.

    Links open the run's report items the way Snakemake's own report links do.
    """
    ordered = _order(rows)
    failed = sum(r["verdict"] != "converged" for r in ordered)
    head = ["run", "verdict", "worst R-hat", "lowest ESS", "steps (kept)", "replicas",
            "sampling s", "plots and tables", "warnings"]
    body = []
    for r in ordered:
        links = ", ".join(
            f"`{label} <javascript:app.showResultInfo('{results}/{r['run']}/{rel}')>`__"
            for label, rel in RUN_ITEMS
        )
        rhat = "" if r["worst_rhat"] is None else f"{r['worst_rhat']:.4f}"
        ess = "" if r["lowest_ess"] is None else f"{r['lowest_ess']:,}"
        verdict = r["verdict"] if r["verdict"] == "converged" else f"**{r['verdict']}**"
        steps = f"{r['steps']:,} ({r['kept_steps']:,})" if r["steps"] != "" else ""
        body.append([
            r["run"], verdict,
            f"{rhat} ({r['worst_rhat_parameter']})" if rhat else "",
            f"{ess} ({r['lowest_ess_parameter']})" if ess else "",
            steps, str(r["replicas"]), f"{r['sampling_seconds']:g}", links,
            _cell(r["warnings"]),
        ])
    lines = [
        "Runs",
        "====",
        "",
        f"{len(ordered)} run(s), {failed} not converged (listed first). The same table is "
        f"``{results}/runs.csv``. Each run's plots and tables are also under its category "
        "in the menu.",
        "",
        ".. list-table::",
        "   :header-rows: 1",
        "",
    ]
    for row in [head, *body]:
        lines.append("   * - " + (row[0] or "-"))
        lines += [f"     - {c or '-'}" for c in row[1:]]
    Path(path).write_text("\n".join(lines) + "\n")
