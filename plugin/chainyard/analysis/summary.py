"""Posterior summaries of a run: mean, sd, quantiles and their Monte Carlo errors."""

from __future__ import annotations

import csv
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from chainyard.store import Store

__all__ = ["SUMMARY_COLUMNS", "summarise", "write_summary_csv"]

SUMMARY_COLUMNS = (
    "parameter",
    "unit",
    "mean",
    "sd",
    "mcse_sd",
    "mcse_mean",
    "q05",
    "mcse_q05",
    "q50",
    "q95",
    "mcse_q95",
    "ess_bulk",
    "ess_tail",
    "rhat_nested",
    "rhat",
)


def summarise(stores: Sequence[Store], diagnostics: dict[str, Any]) -> list[dict[str, Any]]:
    """One row per parameter (columns :data:`SUMMARY_COLUMNS`), from a diagnostics result.

    Rows follow the stores' parameter order (the config's), not the record's key order (a
    diagnostics record read back from JSON has its keys sorted).
    """
    units = {p.name: p.unit for p in stores[0].config.parameters}
    rows = []
    for name in stores[0].param_names:
        d = diagnostics["params"][name]
        rows.append(
            {
                "parameter": name,
                "unit": units.get(name) or "",
                **{k: d.get(k) for k in SUMMARY_COLUMNS[2:]},
            }
        )
    return rows


def write_summary_csv(rows: list[dict[str, Any]], path: str | Path) -> None:
    """Write summary rows as CSV (empty cells for missing values)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=list(SUMMARY_COLUMNS))
        w.writeheader()
        for row in rows:
            w.writerow({k: ("" if row.get(k) is None else row[k]) for k in SUMMARY_COLUMNS})
