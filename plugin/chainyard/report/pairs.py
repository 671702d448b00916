"""The pairs figure: how each pair of parameters varies together, replica by replica.

Layout of the k x k grid (k parameters, at most :data:`MAX_PARAMS`):

* diagonal: the smoothed density of each parameter, one line per replica over the pooled
  density (grey), titled with the median and the central 90% interval;
* below it: smoothed 2-D density regions holding :data:`LEVELS` of the draws (solid: 50%,
  dashed: 90%), one colour per replica, so replicas that disagree show as separate outlines;
* above it: the correlation coefficient of the pair with its MCSE and, with several
  replicas, the range of the replicas' own coefficients, on a tint of the coefficient;
* reference values (a simulation's truths, an earlier estimate): an open diamond where two
  meet, a pointer on the axis of a single parameter.

Smoothing is a Gaussian kernel on a fine histogram (``SMOOTH_BINS`` bins of width
``BINS``), computed with NumPy only. The regions are highest-density regions of the
smoothed histogram (the smallest set of bins holding the stated share of the draws).

The numbers are computed in :mod:`chainyard.report.pairs_density` (NumPy only) and the
panels drawn by :mod:`chainyard.report.pairs_panels`; this module lays out the grid.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np
import numpy.typing as npt
from matplotlib.lines import Line2D

from chainyard.report.pairs_density import LEVELS, correlation_with_mcse
from chainyard.report.pairs_density import region_thresholds as region_thresholds  # re-export
from chainyard.report.pairs_panels import (
    REFERENCE_INK,
    _diagonal_panel,
    _lower_panel,
    _upper_panel,
)
from chainyard.report.plots import INK, _colour, _save, axis_label, member_word

__all__ = ["LEVELS", "MAX_PARAMS", "correlation_with_mcse", "pairs_figure", "pairs_plot"]

#: parameters shown (the first ones, in the config's order)
MAX_PARAMS = 10
#: draws read per parameter (all replicas, evenly spaced steps)
MAX_DRAWS = 200_000


def _limits(pooled: npt.NDArray[np.float64], ref: float | None) -> tuple[float, float]:
    lo, hi = np.quantile(pooled, [0.002, 0.998])
    if ref is not None and np.isfinite(ref):
        lo, hi = min(lo, ref), max(hi, ref)
    pad = 0.06 * (hi - lo) if hi > lo else max(abs(hi), 1.0) * 0.01
    return float(lo - pad), float(hi + pad)


def _read(stores: Sequence[Any], j: int, stride: int) -> list[npt.NDArray[np.float64]]:
    """Parameter ``j`` of each replica, every ``stride``-th step, shape (walkers, steps)."""
    steps = min(s.steps_done for s in stores)
    return [np.asarray(s.column(j, 0, steps)[::stride], dtype=np.float64).T for s in stores]


def pairs_figure(
    stores: Sequence[Any],
    *,
    references: Mapping[str, float] | None = None,
    max_params: int = MAX_PARAMS,
    max_draws: int = MAX_DRAWS,
) -> Any:
    """The pairs figure of the replicas' draws (a matplotlib Figure; see the module doc).

    Parameters
    ----------
    stores : sequence of Store or selected view
        Replicas of one run (the draws after burn-in and thinning).
    references : mapping of str to float, optional
        Reference values by parameter name.
    max_params : int
        Parameters shown (the first ones).
    max_draws : int
        Draws read per parameter over all replicas (evenly spaced steps).
    """
    references = references or {}
    all_names = stores[0].param_names
    names = all_names[:max_params]
    k = len(names)
    steps = min(s.steps_done for s in stores)
    total = steps * sum(s.walkers for s in stores)
    stride = max(1, -(-total // max_draws))
    cols = [_read(stores, j, stride) for j in range(k)]  # [param][replica] (walkers, steps)
    pooled = [np.concatenate([c.ravel() for c in per]) for per in cols]
    limits = [_limits(p, references.get(n)) for p, n in zip(pooled, names, strict=True)]
    size = 1.75 if k > 6 else 2.1
    fig, axes = plt.subplots(k, k, figsize=(size * k + 0.6, size * k + 0.9), squeeze=False)
    fig.subplots_adjust(wspace=0.08, hspace=0.08)
    cmap = plt.get_cmap("PuOr_r")
    for r in range(k):
        for c in range(k):
            ax = axes[r, c]
            ax.tick_params(labelsize=6, colors=INK, length=2)
            for side in ("top", "right"):
                ax.spines[side].set_visible(False)
            if c > r:
                _upper_panel(ax, cols[r], cols[c], cmap)
                continue
            ax.set_xlim(*limits[c])
            if r == c:
                _diagonal_panel(ax, cols[c], pooled[c], limits[c], references.get(names[c]))
                q = np.quantile(pooled[c], [0.5, 0.05, 0.95])
                median, lo, hi = (_at_spread(float(v), float(q[2] - q[1])) for v in q)
                ax.set_title(
                    f"{names[c]}\nmedian {median}\n90%: {lo} to {hi}",
                    fontsize=6.5,
                    color=INK,
                    pad=2,
                )
            else:
                ax.set_ylim(*limits[r])
                _lower_panel(
                    ax,
                    cols[c],
                    cols[r],
                    limits[c],
                    limits[r],
                    references.get(names[c]),
                    references.get(names[r]),
                )
            if r == k - 1:
                ax.set_xlabel(axis_label(stores[0], names[c], short=True), fontsize=7)
            else:
                ax.tick_params(labelbottom=False)
            if c == 0 and r > 0:
                ax.set_ylabel(axis_label(stores[0], names[r], short=True), fontsize=7)
            elif r != c:
                ax.tick_params(labelleft=False)
    handles = [
        Line2D([], [], color=_colour(i), linewidth=1.4, label=f"replica {s.replica}")
        for i, s in enumerate(stores)
    ]
    handles += [
        Line2D([], [], color=INK, linewidth=1.2, label=f"{LEVELS[0]:.0%} region"),
        Line2D([], [], color=INK, linewidth=0.9, linestyle="--", label=f"{LEVELS[1]:.0%} region"),
    ]
    if any(n in references for n in names):
        handles.append(
            Line2D(
                [],
                [],
                color=REFERENCE_INK,
                marker="D",
                markerfacecolor="white",
                linestyle="none",
                markersize=6,
                label="reference value",
            )
        )
    fig.legend(
        handles=handles,
        loc="lower center",
        ncols=len(handles) if k >= 4 else min(len(handles), 4),
        fontsize=7,
        frameon=False,
        bbox_to_anchor=(0.5, 0.0),
    )
    shown = "" if k == len(all_names) else f" (first {k} of {len(all_names)} parameters)"
    fig.suptitle(
        f"How the parameters vary together{shown}\n"
        f"below: density regions per replica; above: correlation r with its MCSE (tint from "
        f"r = -1, purple, to +1, orange)\n{len(stores)} replica(s), every "
        f"{member_word(stores)} pooled, after burn-in and thinning",
        fontsize=8.5,
        color=INK,
        y=0.995,
    )
    fig.tight_layout(
        rect=(0, 0.035 if k >= 4 else 0.07, 1, 0.97 if k >= 6 else 0.93),
        pad=0.4,
        h_pad=0.25,
        w_pad=0.25,
    )
    return fig


def _at_spread(value: float, spread: float) -> str:
    """``value`` to the decimals that show three digits of ``spread`` (the 90% interval's
    width): one decimal count for a panel's median and interval, no sign on zero."""
    digits = 2 - int(np.floor(np.log10(spread))) if spread > 0 and np.isfinite(spread) else 3
    text = f"{value:.{max(digits, 0)}f}" if max(digits, 0) <= 12 else f"{value:.3g}"
    return text[1:] if text.startswith("-") and float(text) == 0 else text


def pairs_plot(
    stores: Sequence[Any],
    path: str | Path,
    *,
    references: Mapping[str, float] | None = None,
    max_params: int = MAX_PARAMS,
    max_draws: int = MAX_DRAWS,
) -> None:
    """Write :func:`pairs_figure` as a PNG at ``path`` (with the stores' provenance stamp)."""
    fig = pairs_figure(stores, references=references, max_params=max_params, max_draws=max_draws)
    _save(fig, path, stores)
