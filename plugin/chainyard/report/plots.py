"""Plots of a run: traces with the burn-in cut, tau against steps, acceptance per walker
(or chain); the pairs figure is in :mod:`chainyard.report.pairs`. Each reads one parameter
column at a time and writes a PNG.
"""

from __future__ import annotations

import os
import textwrap
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np
from matplotlib.lines import Line2D

from chainyard.diagnostics import integrated_time_history
from chainyard.store import Store

__all__ = [
    "acceptance_plot",
    "axis_label",
    "tau_history_plot",
    "trace_figure",
    "trace_plot",
]

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
REFERENCE_COLOUR = "#111111"
WALKER_INK = "#7a7a7a"
MAX_POINTS = 2000
#: single walkers drawn on the traces (of the first replica)
WALKERS_SHOWN = 3


def _colour(i: int) -> str:
    return REPLICA_COLOURS[i % len(REPLICA_COLOURS)]


def member_word(stores: Sequence[Any]) -> str:
    """``walker`` for ensemble runs, ``chain`` for the chain kinds (from the store's
    ``sampler_kind`` attribute; a selected view asks its store)."""
    attrs = getattr(getattr(stores[0], "store", stores[0]), "attrs", None) or {}
    return "walker" if attrs.get("sampler_kind", "ensemble") == "ensemble" else "chain"


def _parameter(store: Any, name: str) -> Any:
    """The config entry of parameter ``name`` (None if the config does not list it)."""
    for p in store.config.parameters:
        if p.name == name:
            return p
    return None


def axis_label(store: Any, name: str, *, short: bool = False) -> str:
    """``label [unit]`` of a parameter from the run config (``name [unit]`` if ``short``)."""
    p = _parameter(store, name)
    if p is None:
        return name
    text = p.name if short or not p.label else p.label
    return f"{text} [{p.unit}]" if p.unit else text


def _style(ax: Any) -> None:
    ax.spines[["top", "right"]].set_visible(False)
    ax.tick_params(colors=INK, labelsize=8)
    ax.grid(True, color="#e6e6e6", linewidth=0.6)
    ax.set_axisbelow(True)


def _save(fig: Any, path: str | Path, stores: Sequence[Any]) -> None:
    """Write the PNG (temporary sibling, then renamed) with the inputs' provenance stamp."""
    from chainyard.provenance.stamps import png_metadata

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    inputs = [getattr(s, "store", s) for s in stores]  # a selected view stamps its store
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        fig.savefig(tmp, format="png", dpi=110, bbox_inches="tight", metadata=png_metadata(inputs))
        os.replace(tmp, path)
    finally:
        plt.close(fig)
        tmp.unlink(missing_ok=True)


def _wrapped(text: str, width: int = 95) -> str:
    """A panel title broken into lines of at most ``width`` characters."""
    return "\n".join(textwrap.wrap(text, width)) or text


def _walkers_shown(walkers: int, count: int = WALKERS_SHOWN) -> list[int]:
    """A few walkers spread over the ensemble (first, last and evenly between)."""
    return sorted({int(w) for w in np.linspace(0, walkers - 1, min(count, walkers))})


def _after_cut_limits(values: list[Any], x: Any, cut: int | None) -> tuple[float, float] | None:
    """y-limits holding every plotted value at steps >= ``cut`` (None: no zoom needed)."""
    if not cut:
        return None
    keep = x >= cut
    if not keep.any():
        return None
    kept = np.concatenate([np.ravel(v[keep]) for v in values])
    kept = kept[np.isfinite(kept)]
    if kept.size == 0:
        return None
    lo, hi = float(kept.min()), float(kept.max())
    pad = 0.08 * (hi - lo) if hi > lo else max(1.0, abs(hi)) * 0.01
    return lo - pad, hi + pad


def trace_plot(
    stores: Sequence[Any],
    cut: int | None,
    path: str | Path,
    *,
    references: Mapping[str, float] | None = None,
    xlabel: str = "step",
) -> None:
    """Write :func:`trace_figure` as a PNG at ``path``."""
    fig = trace_figure(stores, cut, references=references, xlabel=xlabel)
    _save(fig, path, stores)


def trace_figure(
    stores: Sequence[Any],
    cut: int | None,
    *,
    references: Mapping[str, float] | None = None,
    xlabel: str = "step",
) -> Any:
    """Traces of every parameter and the log-probability, one panel each (a Figure).

    Per replica: the walker mean (line) and the 5-95% band of its walkers ("chains" for the
    chain kinds); for the first replica also a few individual walkers (thin lines), to show
    mixing beyond the mean. The burn-in ``cut`` is marked (None: no cut drawn), reference
    values are dotted lines, and the log-probability panel's y-range is fitted to the steps
    after the cut (earlier steps usually span orders of magnitude more and would flatten
    what matters). Each panel is
    titled with the parameter's label (wrapped), the unit on the y axis.
    """
    names = stores[0].param_names
    references = references or {}
    rows = len(names) + 1
    fig, axes = plt.subplots(rows, 1, figsize=(9, 1.9 * rows + 0.4), sharex=True, squeeze=False)
    steps = min(s.steps_done for s in stores)
    stride = max(1, steps // MAX_POINTS)
    x = np.arange(0, steps, stride)
    shown = _walkers_shown(stores[0].walkers)
    word = member_word(stores)
    for row, j in enumerate([*range(len(names)), -1]):
        ax = axes[row, 0]
        plotted = []
        for i, s in enumerate(stores):
            col = s.log_prob(0, steps) if j < 0 else s.column(j, 0, steps)
            col = col[::stride]
            lo, hi = np.quantile(col, [0.05, 0.95], axis=1)
            mean = col.mean(axis=1)
            plotted += [lo, hi, mean]
            ax.fill_between(x, lo, hi, color=_colour(i), alpha=0.15, linewidth=0)
            if i == 0:
                for k, w in enumerate(shown):
                    ax.plot(
                        x,
                        col[:, w],
                        color=WALKER_INK,
                        linewidth=0.45,
                        alpha=0.55,
                        label=f"{word}s {', '.join(map(str, shown))} of replica {s.replica}"
                        if k == 0
                        else None,
                    )
            ax.plot(
                x, mean, color=_colour(i), linewidth=1.0, label=f"replica {s.replica}: {word} mean"
            )
        if cut is not None:
            ax.axvline(cut, color=CUT_COLOUR, linestyle="--", linewidth=1.0, label="burn-in cut")
        if j >= 0 and names[j] in references:
            ax.axhline(
                references[names[j]],
                color=REFERENCE_COLOUR,
                linestyle=":",
                linewidth=1.4,
                label="reference value",
            )
        if j < 0:
            title = "log-probability"
            limits = _after_cut_limits(plotted, x, cut)
            if limits is not None:
                ax.set_ylim(*limits)
                title += " (y range fitted to the steps after the burn-in cut)"
            ax.set_ylabel("log-prob", fontsize=8)
        else:
            p = _parameter(stores[0], names[j])
            label = p.label if p is not None and p.label else names[j]
            title = label if label == names[j] else f"{names[j]}: {label}"
            ax.set_ylabel(p.unit if p is not None and p.unit else "", fontsize=8)
        ax.set_title(_wrapped(title), loc="left", fontsize=8, color=INK, pad=3)
        _style(ax)
    if cut is not None:
        axes[0, 0].annotate(
            f"burn-in cut: step {cut:,}",
            xy=(cut, 1.0),
            xycoords=("data", "axes fraction"),
            xytext=(4, -10),
            textcoords="offset points",
            color=CUT_COLOUR,
            fontsize=8,
        )
    handles: dict[str, Any] = {}
    for ax in axes[:, 0]:
        for h, label in zip(*ax.get_legend_handles_labels(), strict=True):
            handles.setdefault(label, h)
    fig.legend(
        list(handles.values()),
        list(handles),
        loc="lower center",
        bbox_to_anchor=(0.5, -0.01),
        ncols=min(4, len(handles)),
        fontsize=7,
        frameon=False,
    )
    axes[-1, 0].set_xlabel(xlabel, fontsize=9)
    fig.suptitle(
        f"Traces: {word} mean (line), 5-95% of {word}s (band) and a few single {word}s",
        fontsize=10,
    )
    fig.tight_layout(rect=(0, 0.04, 1, 1))
    return fig


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
            label = f"verdict tau {used['tau']:.3g}" + (f", growth {growth:.2f}" if growth else "")
            ax.axhline(used["tau"], color=CUT_COLOUR, linestyle="--", linewidth=0.9)
            ax.annotate(
                label,
                xy=(0.02, used["tau"]),
                xycoords=("axes fraction", "data"),
                xytext=(0, 3),
                textcoords="offset points",
                color=CUT_COLOUR,
                fontsize=6.5,
            )
        ax.set_title(axis_label(stores[0], name, short=True), fontsize=8)
        ax.set_xlabel("steps used (after burn-in)", fontsize=8)
        ax.set_ylabel("tau [steps]", fontsize=8)
        _style(ax)
    for k in range(len(names), nrow * ncol):
        axes[k // ncol, k % ncol].set_visible(False)
    handles, labels = axes[0, 0].get_legend_handles_labels()
    handles.append(Line2D([], [], color=CUT_COLOUR, linestyle="--", linewidth=0.9))
    labels.append("tau of the verdict (mean over replicas)")
    fig.suptitle(
        "Autocorrelation time vs steps after burn-in, per replica: trust tau where it is flat "
        "and below the dotted line",
        fontsize=9,
        y=1.03,
    )
    spare = len(names) < nrow * ncol  # an empty panel slot holds the legend
    fig.tight_layout(rect=(0, 0 if spare else 0.08, 1, 1))
    where: dict[str, Any] = {"loc": "lower center", "bbox_to_anchor": (0.5, -0.02)}
    if spare:
        slot = axes[-1, -1].get_position()
        where = {"loc": "center", "bbox_to_anchor": (slot.x0, slot.y0, slot.width, slot.height)}
    fig.legend(
        handles,
        labels,
        ncols=1 if spare else min(4, len(labels)),
        fontsize=7,
        frameon=False,
        **where,
    )
    _save(fig, path, stores)


def acceptance_plot(
    stores: Sequence[Store], path: str | Path, diagnostics: dict[str, Any] | None = None
) -> None:
    """Acceptance fraction of every walker (or chain) per replica, with the informative band
    shaded.

    The band is the one the diagnostics used for the run's moves
    (:func:`chainyard.diagnostics.acceptance.acceptance_band`), if ``diagnostics`` is given.
    """
    fig, ax = plt.subplots(figsize=(9, 2.8))
    word = member_word(stores)
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

        handles.append(
            Patch(facecolor="white", edgecolor=INK, hatch="////", label=f"stuck {word}")
        )
    ax.set_ylabel("acceptance fraction", fontsize=8)
    ax.set_xticks([])
    ax.set_xlabel(f"{word}s, grouped by replica", fontsize=8)
    ax.set_ylim(0, 1)
    _style(ax)
    ax.legend(
        handles=handles, fontsize=7, ncols=min(6, len(handles)), frameon=False, loc="upper right"
    )
    _save(fig, path, stores)
