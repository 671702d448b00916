"""The posterior summary table of ``chainyard summarise``, with quantiles of the user's choice.

Per parameter, in the config's parameter order: mean, sd and their MCSE, the chosen
quantiles (``q5``, ``q50``, ``q95`` for the default central 90% interval) each with its MCSE
(Vehtari et al. 2021, Bayesian Analysis 16(2), Sec. 4.4), bulk and tail ESS, nested R-hat
and R-hat, and the unit. Everything except the quantiles comes from
:func:`chainyard.analysis.diagnose` (the same numbers as ``diagnostics.txt``); quantiles are
``numpy.quantile`` (linear interpolation) of the pooled draws of every walker of every
replica. Memory: :func:`diagnose`'s bound, then one parameter column at a time.
"""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Sequence
from typing import Any

import numpy as np

from chainyard.analysis.diagnose import diagnose, read_column
from chainyard.diagnostics import mcse_quantile

__all__ = ["format_summary", "interval_quantiles", "quantile_name", "summary_table"]

#: columns before and after the quantile columns
HEAD = ("parameter", "unit", "mean", "sd", "mcse_mean", "mcse_sd")
TAIL = ("ess_bulk", "ess_tail", "rhat_nested", "rhat")


def interval_quantiles(mass: float) -> tuple[float, float, float]:
    """Lower end, median and upper end of the central interval holding ``mass``."""
    if not 0.0 < mass < 1.0:
        raise ValueError(f"an interval's probability must be between 0 and 1, got {mass:g}")
    return ((1.0 - mass) / 2.0, 0.5, (1.0 + mass) / 2.0)


def quantile_name(q: float) -> str:
    """Column name of a quantile: ``q5`` for 0.05, ``q2.5`` for 0.025."""
    return f"q{round(100.0 * q, 6):g}"


def _finite(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


def summary_table(
    stores: Sequence[Any], quantiles: Sequence[float] = (0.05, 0.5, 0.95)
) -> dict[str, Any]:
    """The summary of a run's replicas (after burn-in) as ``{"columns", "rows", ...}``.

    Parameters
    ----------
    stores : sequence of Store or SelectedStore
        Replicas of one run, the draws to summarise.
    quantiles : sequence of float
        Probabilities in (0, 1), reported in increasing order.

    Returns
    -------
    dict
        ``columns`` (names), ``rows`` (one dict per parameter, config order), ``steps``,
        ``walkers``, ``replicas``, ``quantiles``.
    """
    qs = sorted({float(q) for q in quantiles})
    result = diagnose(stores)
    steps, names = result["steps"], stores[0].param_names
    units = {p.name: p.unit or "" for p in stores[0].config.parameters}
    x = np.empty((sum(s.walkers for s in stores), steps))
    means = np.empty((len(stores), steps))
    rows = []
    for j, name in enumerate(names):
        d = result["params"][name]
        read_column(stores, j, steps, x, means)
        row: dict[str, Any] = {"parameter": name, "unit": units.get(name, "")}
        row.update({k: d.get(k) for k in HEAD[2:]})
        values = np.quantile(x, qs)
        for q, v in zip(qs, values, strict=True):
            row[quantile_name(q)] = float(v)
            row[f"mcse_{quantile_name(q)}"] = _finite(mcse_quantile(x, q))
        row.update({k: d.get(k) for k in TAIL})
        rows.append(row)
    columns = [*HEAD]
    for q in qs:
        columns += [quantile_name(q), f"mcse_{quantile_name(q)}"]
    columns += TAIL
    return {
        "columns": columns,
        "rows": rows,
        "quantiles": qs,
        "steps": steps,
        "walkers": result["walkers"],
        "replicas": result["replicas"],
    }


def _cell(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.4g}"
    return str(value)


def format_summary(table: dict[str, Any], how: str = "text") -> str:
    """The table as ``text`` (aligned columns), ``csv`` or ``json``."""
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
    cells = [columns] + [[_cell(r.get(k)) for k in columns] for r in rows]
    widths = [max(len(c[i]) for c in cells) for i in range(len(columns))]
    lines = [
        f"{table['replicas']} replica(s) x {table['walkers']} walkers x {table['steps']:,} draws"
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
