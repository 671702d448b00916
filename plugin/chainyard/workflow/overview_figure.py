"""One figure across runs: each run's worst R-hat against its lowest bulk ESS, with the targets.

The R-hat drawn is the one the verdict gates on: R-hat when ``max_rhat`` is a target, else
nested R-hat (``max_nested_rhat``).

Readable at hundreds of runs: one point per run, the region where both targets are met
shaded, runs that did not meet their targets drawn in a contrasting colour and the worst
few named.
"""

from __future__ import annotations

import io
from collections import Counter
from collections.abc import Sequence
from typing import Any

__all__ = ["overview_png"]

MET_COLOUR = "#2f5d8a"
NOT_MET_COLOUR = "#c4572f"
INK = "#222222"
#: runs named on the figure (the worst of those that did not meet their targets)
NAMED = 8


def _common(rows: Sequence[dict[str, Any]], key: str) -> tuple[float | None, bool]:
    """The most common target ``key`` over the runs, and whether runs differ in it."""
    values = [r.get("targets", {}).get(key) for r in rows]
    values = [float(v) for v in values if isinstance(v, int | float)]
    if not values:
        return None, False
    value, _ = Counter(values).most_common(1)[0]
    return value, len(set(values)) > 1


def overview_png(rows: Sequence[dict[str, Any]]) -> bytes:
    """The figure as PNG bytes (rows as :func:`chainyard.workflow.overview.overview_row`)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from chainyard.workflow.overview import MET

    max_rhat, rhat_differs = _common(rows, "max_rhat")
    key, what = "worst_rhat", "R-hat"
    if max_rhat is None:  # the verdict gates on nested R-hat: draw that against its target
        max_rhat, rhat_differs = _common(rows, "max_nested_rhat")
        if max_rhat is not None:
            key, what = "worst_nested_rhat", "nested R-hat"
    min_ess, ess_differs = _common(rows, "min_ess_bulk")
    points = [r for r in rows if r.get(key) is not None and r["lowest_ess"] is not None]
    fig, ax = plt.subplots(figsize=(7.5, 3.6))
    ess = [max(float(r["lowest_ess"]), 1.0) for r in points]
    rhat = [float(r[key]) for r in points]
    limit = max_rhat if max_rhat is not None else 1.01
    top = max(1.05, 1.0 + 4.0 * (limit - 1.0))  # runs above are drawn on the top edge
    size = 18 if len(points) <= 100 else 8
    for ok, colour, label in (
        (True, MET_COLOUR, "targets met"),
        (False, NOT_MET_COLOUR, "not met"),
    ):
        chosen = [
            (x, y) for x, y, r in zip(ess, rhat, points, strict=True) if (r["verdict"] == MET) == ok
        ]
        inside = [(x, y) for x, y in chosen if y <= top]
        above = [(x, top) for x, y in chosen if y > top]
        ax.scatter(
            [x for x, _ in inside],
            [y for _, y in inside],
            s=size,
            color=colour,
            alpha=0.75,
            linewidths=0,
            label=f"{label} ({len(chosen)})",
        )
        if above:
            ax.scatter(
                [x for x, _ in above],
                [y for _, y in above],
                s=size * 2,
                marker="^",
                color=colour,
                alpha=0.9,
                linewidths=0,
                clip_on=False,
            )
    ax.set_xscale("log")
    low = min([*rhat, limit, 1.0])
    ax.set_ylim(low - 0.002, top + 0.002)
    xlo, xhi = ax.get_xlim()
    if min_ess is not None:
        xlo, xhi = min(xlo, min_ess / 2), max(xhi, min_ess * 2)
        ax.set_xlim(xlo, xhi)
    if max_rhat is not None and min_ess is not None:
        ax.fill_between(
            [min_ess, xhi], low - 0.002, max_rhat, color="#e8f1e4", zorder=0, linewidth=0
        )
    if max_rhat is not None:
        ax.axhline(max_rhat, color=INK, linestyle="--", linewidth=0.9)
        ax.annotate(
            f"{what} target {max_rhat:g}" + (" (most runs)" if rhat_differs else ""),
            xy=(0.01, max_rhat),
            xycoords=("axes fraction", "data"),
            xytext=(0, 3),
            textcoords="offset points",
            fontsize=7,
            color=INK,
        )
    if min_ess is not None:
        ax.axvline(min_ess, color=INK, linestyle=":", linewidth=0.9)
        ax.annotate(
            f"ESS target {min_ess:,.0f}" + (" (most runs)" if ess_differs else ""),
            xy=(min_ess, 0.02),
            xycoords=("data", "axes fraction"),
            xytext=(3, 0),
            textcoords="offset points",
            fontsize=7,
            color=INK,
        )
    not_met = sorted((r for r in points if r["verdict"] != MET), key=lambda r: -float(r[key]))
    above = [r for r in not_met if float(r[key]) > top]
    for r in [r for r in not_met if float(r[key]) <= top][: max(0, NAMED - len(above))]:
        ax.annotate(
            str(r["run"])[:24],
            xy=(max(float(r["lowest_ess"]), 1.0), float(r[key])),
            xytext=(4, 2),
            textcoords="offset points",
            fontsize=6.5,
            color=NOT_MET_COLOUR,
        )
    if above:  # named in a line of their own: their triangles share the top edge
        names = ", ".join(str(r["run"])[:24] for r in above[:NAMED])
        more = f" and {len(above) - NAMED} more" if len(above) > NAMED else ""
        fig.text(
            0.01,
            -0.02,
            f"{what} above {top:g} (worst first): {names}{more}",
            fontsize=7,
            color=NOT_MET_COLOUR,
            wrap=True,
        )
    ax.set_xlabel("lowest bulk ESS of the run (over parameters, log scale)", fontsize=8)
    ax.set_ylabel(f"worst {what} of the run\n(triangles: above {top:g})", fontsize=8)
    ax.tick_params(labelsize=7, colors=INK)
    ax.spines[["top", "right"]].set_visible(False)
    shown = f"{len(points)} run(s)"
    if len(points) < len(rows):
        shown += f"; {len(rows) - len(points)} without finite values not drawn"
    ax.set_title(
        f"Every run against the targets ({shown}); shaded: both targets met",
        fontsize=8.5,
        color=INK,
        loc="left",
    )
    ax.legend(fontsize=7, frameon=False, loc="upper right")
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, bbox_inches="tight")
    plt.close(fig)
    return buf.getvalue()
