"""The results table: one function builds the rows of ``chainyard results-table`` and of
the workflow's ``summary.csv`` (same columns, same order).

Per parameter, in the config's parameter order: ``parameter``, ``unit``; the estimates
``mean``, ``sd`` and the chosen quantiles, named by their probability in percent
(``lower_5pct``, ``median``, ``upper_95pct`` for the default central 90% interval); then the
Monte Carlo standard error of each estimate in the same order, named ``mcse_`` + the
estimate (quantile MCSE: Vehtari et al. 2021, Bayesian Analysis 16(2), Sec. 4.4); then
``bulk_ess``, ``tail_ess``, ``rhat`` and ``nested_rhat``. Mean, sd, their MCSE, ESS and
R-hats come from :func:`chainyard.analysis.diagnose` (the numbers of ``diagnostics.txt``);
quantiles are ``numpy.quantile`` (linear interpolation) of the pooled draws of every walker
(or chain) of every replica. Memory: :func:`diagnose`'s bound, then one parameter column at
a time.
"""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from chainyard.analysis.diagnose import diagnose, read_column
from chainyard.diagnostics import mcse_quantile
from chainyard.display import count, readable

__all__ = [
    "DEFAULT_QUANTILES",
    "format_summary",
    "interval_quantiles",
    "quantile_name",
    "summary_table",
    "write_summary_csv",
]

#: the default quantiles: the ends of the central 90% interval and the median
DEFAULT_QUANTILES = (0.05, 0.5, 0.95)
#: columns taken from the diagnostics, by table column -> diagnostics key
FROM_DIAGNOSTICS = {
    "mean": "mean",
    "sd": "sd",
    "mcse_mean": "mcse_mean",
    "mcse_sd": "mcse_sd",
    "bulk_ess": "ess_bulk",
    "tail_ess": "ess_tail",
    "rhat": "rhat",
    "nested_rhat": "rhat_nested",
}
TAIL = ("bulk_ess", "tail_ess", "rhat", "nested_rhat")


def interval_quantiles(mass: float) -> tuple[float, float, float]:
    """Lower end, median and upper end of the central interval holding ``mass``."""
    if not 0.0 < mass < 1.0:
        raise ValueError(f"an interval's probability must be between 0 and 1, got {mass:g}")
    return ((1.0 - mass) / 2.0, 0.5, (1.0 + mass) / 2.0)


def quantile_name(q: float) -> str:
    """Column name of the quantile at probability ``q``.

    ``median`` for 0.5; below it ``lower_<percent>pct`` (``lower_5pct`` for 0.05,
    ``lower_2.5pct`` for 0.025), above it ``upper_<percent>pct`` (``upper_95pct``).
    """
    if q == 0.5:
        return "median"
    side = "lower" if q < 0.5 else "upper"
    return f"{side}_{round(100.0 * q, 6):g}pct"


def table_columns(quantiles: Sequence[float]) -> list[str]:
    """The table's columns, in order, for the (sorted) ``quantiles``."""
    estimates = ["mean", "sd", *(quantile_name(q) for q in quantiles)]
    return ["parameter", "unit", *estimates, *(f"mcse_{e}" for e in estimates), *TAIL]


def _finite(value: Any) -> float | None:
    if value is None:
        return None
    return float(value) if np.isfinite(value) else None


def summary_table(
    stores: Sequence[Any],
    quantiles: Sequence[float] = DEFAULT_QUANTILES,
    *,
    diagnostics: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """The posterior table of a run's replicas as ``{"columns", "rows", ...}``.

    Parameters
    ----------
    stores : sequence of Store or selected view
        Replicas of one run, the draws to summarise (after burn-in and thinning).
    quantiles : sequence of float
        Probabilities in (0, 1), reported in increasing order.
    diagnostics : mapping, optional
        The :func:`diagnose` result (or record) of these draws; computed when not given.

    Returns
    -------
    dict
        ``columns`` (names, see :func:`table_columns`), ``rows`` (one dict per parameter,
        config order; missing values are None), ``quantiles``, ``steps``, ``walkers``,
        ``replicas``.
    """
    qs = sorted({float(q) for q in quantiles})
    result = diagnose(stores) if diagnostics is None else diagnostics
    steps, names = int(result["steps"]), stores[0].param_names
    units = {p.name: p.unit or "" for p in stores[0].config.parameters}
    x = np.empty((sum(s.walkers for s in stores), steps))
    means = np.empty((len(stores), steps))
    columns = table_columns(qs)
    rows = []
    for j, name in enumerate(names):
        d = result["params"][name]
        read_column(stores, j, steps, x, means)
        row: dict[str, Any] = {"parameter": name, "unit": units.get(name, "")}
        for column, key in FROM_DIAGNOSTICS.items():
            row[column] = _finite(d.get(key))
        for q, v in zip(qs, np.quantile(x, qs), strict=True):
            row[quantile_name(q)] = float(v)
            row[f"mcse_{quantile_name(q)}"] = _finite(mcse_quantile(x, q))
        rows.append({k: row[k] for k in columns})
    return {
        "columns": columns,
        "rows": rows,
        "quantiles": qs,
        "steps": steps,
        "walkers": result["walkers"],
        "replicas": result["replicas"],
        "sampler_kind": result.get("sampler_kind", "ensemble"),
    }


def cell(column: str, value: Any) -> str:
    """How the text table writes one value: R-hats with 4 decimals (5 when 4 would read as
    exactly 1.0000), ESS as whole numbers, other numbers with 4 significant digits."""
    if value is None:
        return "-"
    if not isinstance(value, float | int):
        return str(value)
    if column in ("rhat", "nested_rhat"):
        text = f"{value:.4f}"
        return f"{value:.5f}" if text == "1.0000" and value != 1.0 else text
    if column.endswith("_ess"):
        return count(value)
    return readable(value)


def format_summary(table: Mapping[str, Any], how: str = "text") -> str:
    """The table as ``text`` (aligned columns), ``csv`` (full precision) or ``json``."""
    columns, rows = table["columns"], table["rows"]
    if how == "json":
        return json.dumps(table, indent=1, allow_nan=False)
    if how == "csv":
        buf = io.StringIO()
        w = csv.DictWriter(buf, fieldnames=columns, lineterminator="\n")
        w.writeheader()
        for row in rows:
            w.writerow({k: ("" if row.get(k) is None else row[k]) for k in columns})
        return buf.getvalue().rstrip("\n")
    cells = [columns] + [[cell(k, r.get(k)) for k in columns] for r in rows]
    widths = [max(len(c[i]) for c in cells) for i in range(len(columns))]
    unit = "walkers" if table.get("sampler_kind", "ensemble") == "ensemble" else "chains"
    lines = [
        f"{table['replicas']} replica(s) x {table['walkers']} {unit} x {table['steps']:,} draws"
    ]
    for k, line in enumerate(cells):
        lines.append(
            "  ".join(
                v.ljust(w) if i < 2 else v.rjust(w)
                for i, (v, w) in enumerate(zip(line, widths, strict=True))
            )
        )
        if k == 0:
            lines.append("-" * len(lines[-1]))
    return "\n".join(lines)


def write_summary_csv(table: Mapping[str, Any], path: str | Path) -> None:
    """Write the table as CSV at ``path`` (the workflow's ``summary.csv``)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(format_summary(table, "csv") + "\n")
