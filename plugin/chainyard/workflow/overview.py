"""The cross-run overview: one row per run (``RESULTS/runs.csv``) and the report's opening page.

Rows are ordered failed runs first (worst R-hat first among them), so the few runs that need
attention among hundreds are at the top. The opening page of ``snakemake --report`` is the
same table (reStructuredText, rendered by Snakemake), each run linking to its plots and tables,
under one figure of every run's worst R-hat and lowest ESS against the targets
(:mod:`chainyard.workflow.overview_figure`). The verdict column says ``targets met`` or
``targets not met``: a verdict compares diagnostics with targets; it cannot prove convergence.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Sequence
from datetime import datetime
from pathlib import Path
from typing import Any

__all__ = [
    "MET",
    "NOT_MET",
    "OVERVIEW_COLUMNS",
    "overview_row",
    "warning_sentences",
    "write_overview_rst",
    "write_runs_csv",
]

#: the verdict column's words
MET, NOT_MET = "targets met", "targets not met"

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


def _sentence(text: str) -> str:
    text = text.strip()
    return text[:1].upper() + text[1:] + ("" if text.endswith((".", "!", "?")) else ".")


def _listed(items: Sequence[Any], most: int = 8) -> str:
    shown = ", ".join(str(i) for i in items[:most])
    return shown + (f" and {len(items) - most} more" if len(items) > most else "")


def warning_sentences(diagnostics: dict[str, Any]) -> list[str]:
    """The verdict's failures and warnings of one run as plain sentences (no Python reprs).

    One sentence per failed parameter (``alpha did not meet its targets: rhat 1.0104 >
    1.01.``), one per acceptance warning, one per replica with stuck walkers (chains) or
    walkers in a minority region.
    """
    verdict = diagnostics.get("verdict") or {}
    out = [
        f"{name} did not meet its targets: {'; '.join(v.get('failures') or [])}."
        for name, v in (verdict.get("params") or {}).items()
        if v.get("failures")
    ]
    out += [_sentence(str(w)) for w in diagnostics.get("acceptance_warnings") or []]
    kind = diagnostics.get("sampler_kind", "ensemble")
    word = "walker" if kind == "ensemble" else "chain"
    stuck = verdict.get("stuck_walkers") or {}
    for replica in sorted(stuck, key=lambda r: int(r) if str(r).isdigit() else str(r)):
        members = list(stuck[replica] or [])
        # an acceptance warning may already name them
        told = any(w.startswith(f"Replica {replica}:") and "stuck" in w for w in out)
        if members and not told:
            many = len(members) > 1
            out.append(
                f"Replica {replica}: {word}{'s' if many else ''} {_listed(members)} "
                f"{'are' if many else 'is'} stuck (acceptance far below the others)."
            )
    minority = verdict.get("minority_walkers") or {}
    for replica in sorted(minority, key=lambda r: int(r) if str(r).isdigit() else str(r)):
        members = list(minority[replica] or [])
        if members:
            many = len(members) > 1
            out.append(
                f"Replica {replica}: {word}{'s' if many else ''} {_listed(members)} "
                f"{'sit' if many else 'sits'} in a region the other {word}s do not visit."
            )
    return out


def overview_row(diagnostics: dict[str, Any], stores: Sequence[Any]) -> dict[str, Any]:
    """One row of runs.csv from a run's diagnostics record and its (opened) replica stores."""
    params = diagnostics.get("params") or {}
    verdict = diagnostics.get("verdict") or {}
    rhat, rhat_name = _worst(params, "rhat", max)
    ess, ess_name = _worst(params, "ess_bulk", min)
    warnings = warning_sentences(diagnostics)
    selection = diagnostics.get("selection") or {}
    return {
        "run": diagnostics.get("run", ""),
        "verdict": MET if verdict.get("ok") else NOT_MET,
        "worst_rhat": None if rhat is None else round(rhat, 4),
        "worst_rhat_parameter": rhat_name,
        "lowest_ess": None if ess is None else round(ess),
        "lowest_ess_parameter": ess_name,
        "steps": selection.get("steps_used", ""),
        "kept_steps": diagnostics.get("steps", ""),
        "replicas": diagnostics.get("replicas", len(stores)),
        "walkers": diagnostics.get("walkers", ""),
        "sampling_seconds": round(_seconds(stores), 1),
        "warnings": " ".join(warnings),
        "targets": diagnostics.get("targets") or {},  # these two: for the figure only
        "worst_nested_rhat": _worst(params, "rhat_nested", max)[0],
    }


def _order(rows: Sequence[dict[str, Any]]) -> list[dict[str, Any]]:
    """Runs that did not meet their targets first, then by worst R-hat (largest first), then
    by name."""
    return sorted(
        rows,
        key=lambda r: (
            r["verdict"] == MET,
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


#: CSS for the opening page (Snakemake puts the page beside the workflow graph in a narrow
#: column; a wide table would run under the graph): the page takes the full width with
#: the graph below it, and the table scrolls in its own box under a fixed header row.
PAGE_STYLE = """<style>
div.flex.gap-3:has(#chainyard-overview) { flex-direction: column; }
div.h-screen:has(#chainyard-overview) { align-items: flex-start; justify-content: flex-start; }
div.prose:has(#chainyard-overview) { max-width: none; }
#chainyard-overview .chainyard-runs { max-height: 75vh; overflow: auto; }
#chainyard-overview .chainyard-runs table { margin: 0; font-size: 0.8rem; }
#chainyard-overview .chainyard-runs thead th {
  position: sticky; top: 0; background: #ffffff; z-index: 1; }
#chainyard-overview img { max-width: 100%; height: auto; }
#chainyard-overview .chainyard-runs td:last-child { min-width: 18rem; }
#chainyard-overview .chainyard-runs td:nth-child(8) { min-width: 15rem; }
#chainyard-overview .chainyard-runs td, #chainyard-overview .chainyard-runs th {
  padding-top: 0.3rem; padding-bottom: 0.3rem; }
</style>"""


def write_overview_rst(
    rows: Sequence[dict[str, Any]],
    results: str,
    path: str | Path,
    figure: bytes | None = None,
) -> None:
    """The report's opening page: the figure across runs, then the overview table, each run
    linking to its items.

    Links open the run's report items the way Snakemake's own report links do; ``figure``
    (PNG bytes, :func:`chainyard.workflow.overview_figure.overview_png`) is embedded.
    """
    import base64

    ordered = _order(rows)
    failed = sum(r["verdict"] != MET for r in ordered)
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
        verdict = r["verdict"] if r["verdict"] == MET else f"**{r['verdict']}**"
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
        ".. raw:: html",
        "",
        *(f"   {line}" for line in PAGE_STYLE.splitlines()),
        '   <div id="chainyard-overview">',
        "",
        f"{len(ordered)} run(s), {failed} did not meet their targets (listed first). The same "
        f"table is ``{results}/runs.csv``. Each run's plots and tables are also under its "
        "category in the menu. A verdict compares diagnostics with targets: it can show that "
        "a run has not converged, never prove that it has.",
        "",
    ]
    if figure is not None:
        # docutils refuses lines over 10,000 characters; a data URL may hold line breaks
        data = base64.encodebytes(figure).decode("ascii").splitlines()
        lines += [
            ".. raw:: html",
            "",
            '   <img alt="worst R-hat against lowest ESS, one point per run" '
            'src="data:image/png;base64,',
            *(f"   {chunk}" for chunk in data),
            '   ">',
            "",
        ]
    lines += [
        ".. raw:: html",
        "",
        '   <div class="chainyard-runs">',
        "",
        ".. list-table::",
        "   :header-rows: 1",
        "",
    ]
    for row in [head, *body]:
        lines.append("   * - " + (row[0] or "-"))
        lines += [f"     - {c or '-'}" for c in row[1:]]
    lines += ["", ".. raw:: html", "", "   </div></div>", ""]
    Path(path).write_text("\n".join(lines) + "\n")
