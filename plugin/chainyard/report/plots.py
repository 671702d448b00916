"""Plots of a run: traces with the burn-in cut, tau against steps, pairwise marginals,
acceptance per walker. Each reads one parameter column at a time and writes a PNG.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np

from chainyard.diagnostics import integrated_time_history
from chainyard.store import Store

__all__ = ["acceptance_plot", "axis_label", "pairs_plot", "tau_history_plot", "trace_plot"]

#: one colour per replica (cycled): a muted palette of our own
REPLICA_COLOURS = (
    "#2f5d8a",
    "#c4572f",
    "#3f8f5a",
    "#8c4f9e",
    "#b08d1a",
    "#4a8f9e",
    "#9e4a6a",
    "#5e5e5e",
)
INK = "#222222"
CUT_COLOUR = "#b22222"
MAX_POINTS = 2000


def _colour(i: int) -> str:
    return REPLICA_COLOURS[i % len(REPLICA_COLOURS)]


def axis_label(store: Store, name: str, *, short: bool = False) -> str:
    """``label [unit]`` of a parameter from the run config (``name [unit]`` if ``short``)."""
    for p in store.config.parameters:
        if p.name == name:
            text = p.name if short or not p.label else p.label
            return f"{text} [{p.unit}]" if p.unit else text
    return name


def _style(ax: Any) -> None:
    ax.spines[["top", "right"]].set_visible(False)
    ax.tick_params(colors=INK, labelsize=8)
    ax.grid(True, color="#e6e6e6", linewidth=0.6)
    ax.set_axisbelow(True)


def _save(fig: Any, path: str | Path, stores: Sequence[Store]) -> None:
    from chainyard.provenance.stamps import png_metadata

    Path(path).parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110, bbox_inches="tight", metadata=png_metadata(list(stores)))
    plt.close(fig)


def trace_plot(stores: Sequence[Store], cut: int, path: str | Path) -> None:
    """Walker-mean trace and 5-95% walker band per replica, with the burn-in cut marked."""
    names = stores[0].param_names
    fig, axes = plt.subplots(
        len(names) + 1, 1, figsize=(9, 1.9 * (len(names) + 1)), sharex=True, squeeze=False
    )
    steps = min(s.steps_done for s in stores)
    stride = max(1, steps // MAX_POINTS)
    x = np.arange(0, steps, stride)
    for row, j in enumerate([*range(len(names)), -1]):
        ax = axes[row, 0]
        for i, s in enumerate(stores):
            col = s.log_prob(0, steps) if j < 0 else s.column(j, 0, steps)
            col = col[::stride]
            lo, hi = np.quantile(col, [0.05, 0.95], axis=1)
            ax.fill_between(x, lo, hi, color=_colour(i), alpha=0.15, linewidth=0)
            ax.plot(
                x, col.mean(axis=1), color=_colour(i), linewidth=0.9, label=f"replica {s.replica}"
            )
        ax.axvline(cut, color=CUT_COLOUR, linestyle="--", linewidth=1.0)
        ax.set_ylabel("log-prob" if j < 0 else axis_label(stores[0], names[j]), fontsize=8)
        _style(ax)
    axes[0, 0].annotate(
        f"burn-in cut: step {cut:,}",
        xy=(cut, 1.0),
        xycoords=("data", "axes fraction"),
        xytext=(4, -10),
        textcoords="offset points",
        color=CUT_COLOUR,
        fontsize=8,
    )
    axes[0, 0].legend(fontsize=7, ncols=min(4, len(stores)), loc="lower right", frameon=False)
    axes[-1, 0].set_xlabel("step", fontsize=9)
    fig.suptitle("Traces: walker mean (line) and 5-95% of walkers (band)", fontsize=10)
    _save(fig, path, stores)


def tau_history_plot(
    stores: Sequence[Store],
    path: str | Path,
    *,
    cut: int = 0,
    diagnostics: dict[str, Any] | None = None,
) -> None:
    """Autocorrelation time on growing prefixes of the steps the verdict uses, per replica.

    Give the stores the verdict was computed on (after burn-in and thinning), or the raw
    stores with ``cut`` (steps before it are left out). Each replica has its own colour and
    legend entry; the dotted line is ``steps / 50`` (the 50-tau rule: trust tau where the
    curve is flat and below it); with ``diagnostics`` the verdict's tau (largest over
    replicas) is drawn as a dashed line with its growth ratio (whole run / first half).
    """
    names = stores[0].param_names
    ncol = min(3, len(names))
    nrow = -(-len(names) // ncol)
    fig, axes = plt.subplots(nrow, ncol, figsize=(3.3 * ncol, 2.6 * nrow), squeeze=False)
    steps = min(s.steps_done for s in stores)
    params = (diagnostics or {}).get("params", {})
    for j, name in enumerate(names):
        ax = axes[j // ncol, j % ncol]
        longest = 0
        for i, s in enumerate(stores):
            if steps - cut < 4:
                break
            lengths, taus = integrated_time_history(s.column(j, cut, steps).T, n_points=12)
            ax.loglog(
                lengths,
                taus,
                "o-",
                color=_colour(i),
                markersize=3,
                linewidth=1,
                label=f"replica {s.replica}",
            )
            longest = max(longest, int(lengths[-1]))
        ref = np.geomspace(10, max(longest, 20), 20)
        ax.loglog(ref, ref / 50, color=INK, linestyle=":", linewidth=1, label="steps / 50")
        used = params.get(name, {})
        if used.get("tau"):
            growth = used.get("tau_growth")
            label = f"verdict tau {used['tau']:.3g}" + (f" (growth {growth:.2f})" if growth else "")
            ax.axhline(used["tau"], color=CUT_COLOUR, linestyle="--", linewidth=0.9, label=label)
        ax.set_title(axis_label(stores[0], name, short=True), fontsize=8)
        ax.set_xlabel("steps used (after burn-in)", fontsize=8)
        ax.set_ylabel("tau [steps]", fontsize=8)
        _style(ax)
        ax.legend(fontsize=6, frameon=False)
    for k in range(len(names), nrow * ncol):
        axes[k // ncol, k % ncol].set_visible(False)
    fig.suptitle(
        "Autocorrelation time vs steps after burn-in, per replica: trust tau where it is flat "
        "and below the dotted line",
        fontsize=9,
        y=1.03,
    )
    _save(fig, path, stores)


def pairs_plot(
    stores: Sequence[Store], path: str | Path, max_params: int = 6, max_draws: int = 20_000
) -> None:
    """Pairwise marginals of the pooled final draws (subsampled evenly)."""
    names = stores[0].param_names[:max_params]
    cols = []
    for j in range(len(names)):
        pooled = np.concatenate([s.column(j).reshape(-1) for s in stores])
        cols.append(pooled)
    n = cols[0].size
    take = np.linspace(0, n - 1, min(n, max_draws)).astype(int)
    data = [c[take] for c in cols]
    k = len(names)
    fig, axes = plt.subplots(k, k, figsize=(2.0 * k + 0.5, 2.0 * k + 0.5), squeeze=False)
    for r in range(k):
        for c in range(k):
            ax = axes[r, c]
            if c > r:
                ax.set_visible(False)
                continue
            if r == c:
                ax.hist(data[c], bins=40, color=REPLICA_COLOURS[0], alpha=0.8)
                ax.set_yticks([])
            else:
                ax.hist2d(data[c], data[r], bins=40, cmap="Blues")
            if r == k - 1:
                ax.set_xlabel(axis_label(stores[0], names[c], short=True), fontsize=7)
            if c == 0 and r > 0:
                ax.set_ylabel(axis_label(stores[0], names[r], short=True), fontsize=7)
            ax.tick_params(labelsize=6)
    fig.suptitle("Pairwise marginals (after burn-in and thinning, replicas pooled)", fontsize=9)
    _save(fig, path, stores)


def acceptance_plot(
    stores: Sequence[Store], path: str | Path, diagnostics: dict[str, Any] | None = None
) -> None:
    """Acceptance fraction of every walker per replica, with the informative band shaded.

    The band is the one the diagnostics used for the run's moves
    (:func:`chainyard.diagnostics.acceptance.acceptance_band`), if ``diagnostics`` is given.
    """
    fig, ax = plt.subplots(figsize=(9, 2.8))
    bands = [a.get("band") for a in (diagnostics or {}).get("acceptance", []) if a.get("band")]
    if bands:
        lo, hi = bands[0]
        ax.axhspan(lo, hi, color="#e8f1e4", label=f"{lo:g}-{hi:g} (no warning)")
    stuck = {
        a["replica"]: set(a.get("stuck_walkers", []))
        for a in (diagnostics or {}).get("acceptance", [])
    }
    for i, s in enumerate(stores):
        frac = s.accepted().mean(axis=0)
        x = i * (s.walkers + 4) + np.arange(s.walkers)
        bad = np.array([w in stuck.get(s.replica, set()) for w in range(s.walkers)])
        ax.bar(x[~bad], frac[~bad], width=0.8, color=_colour(i), label=f"replica {s.replica}")
        if bad.any():
            ax.bar(
                x[bad],
                frac[bad],
                width=0.8,
                color="white",
                edgecolor=_colour(i),
                hatch="////",
                linewidth=0.8,
            )
    handles, _ = ax.get_legend_handles_labels()
    if any(stuck.values()):
        from matplotlib.patches import Patch

        handles.append(Patch(facecolor="white", edgecolor=INK, hatch="////", label="stuck walker"))
    ax.set_ylabel("acceptance fraction", fontsize=8)
    ax.set_xticks([])
    ax.set_xlabel("walkers, grouped by replica", fontsize=8)
    ax.set_ylim(0, 1)
    _style(ax)
    ax.legend(
        handles=handles, fontsize=7, ncols=min(6, len(handles)), frameon=False, loc="upper right"
    )
    _save(fig, path, stores)
