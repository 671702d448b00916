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

from chainyard.diagnostics import mcse_mean
from chainyard.report.plots import INK, _colour, _save, axis_label, member_word

__all__ = ["LEVELS", "MAX_PARAMS", "correlation_with_mcse", "pairs_figure", "pairs_plot"]

#: credible levels of the 2-D regions (shares of the draws inside)
LEVELS = (0.5, 0.9)
#: parameters shown (the first ones, in the config's order)
MAX_PARAMS = 10
#: histogram bins per axis before smoothing, and the kernel's sd in bins
BINS = 64
SMOOTH_BINS = 1.6
#: draws read per parameter (all replicas, evenly spaced steps)
MAX_DRAWS = 200_000
REFERENCE_INK = "#111111"
POOLED_FILL = "#d9d9d9"


def _kernel(sigma: float) -> npt.NDArray[np.float64]:
    half = max(1, int(np.ceil(3 * sigma)))
    t = np.arange(-half, half + 1, dtype=np.float64)
    k = np.exp(-0.5 * (t / sigma) ** 2)
    return k / k.sum()


def _smooth(h: npt.NDArray[np.float64], sigma: float = SMOOTH_BINS) -> npt.NDArray[np.float64]:
    """``h`` (1-D or 2-D) convolved with a Gaussian of sd ``sigma`` bins along every axis."""
    k = _kernel(sigma)
    out = np.asarray(h, dtype=np.float64)
    for axis in range(out.ndim):
        out = np.apply_along_axis(lambda v: np.convolve(v, k, mode="same"), axis, out)
    return out


def region_thresholds(density: npt.NDArray[np.float64], levels: Sequence[float]) -> list[float]:
    """Density values whose upper sets hold ``levels`` of the total (increasing order).

    The bins are sorted by density (highest first); the threshold for level ``p`` is the
    density of the bin where the running total first reaches ``p`` of the whole.
    """
    flat = np.sort(density.ravel())[::-1]
    total = np.cumsum(flat)
    if total[-1] <= 0:
        return []
    out = []
    for p in sorted(levels, reverse=True):  # wider region first: lower threshold
        i = int(np.searchsorted(total, p * total[-1]))
        out.append(float(flat[min(i, flat.size - 1)]))
    return sorted(set(out))


def correlation_with_mcse(x: npt.ArrayLike, y: npt.ArrayLike) -> tuple[float, float]:
    """Pearson correlation of two parameters and its Monte Carlo standard error.

    Parameters
    ----------
    x, y : array_like, shape (chains, draws)
        The two parameters' draws (every walker or chain of every replica as a chain).

    Returns
    -------
    (float, float)
        ``r`` and its MCSE: ``r`` is the mean of the product of the standardised draws,
        whose MCSE is :func:`chainyard.diagnostics.mcse_mean` of that product (the
        delta-method error of the standardisation is left out; it is of smaller order).
        ``nan`` for a constant parameter.
    """
    a, b = np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
    sa, sb = a.std(), b.std()
    if not (sa > 0 and sb > 0):
        return float("nan"), float("nan")
    prod = ((a - a.mean()) / sa) * ((b - b.mean()) / sb)
    return float(prod.mean()), float(mcse_mean(prod))


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


def _diagonal_panel(
    ax: Any,
    per_replica: list[npt.NDArray[np.float64]],
    pooled: npt.NDArray[np.float64],
    lim: tuple[float, float],
    ref: float | None,
) -> None:
    edges = np.linspace(lim[0], lim[1], 2 * BINS + 1)
    mids = 0.5 * (edges[1:] + edges[:-1])
    width = edges[1] - edges[0]
    h, _ = np.histogram(pooled, edges)
    dens = _smooth(h.astype(np.float64)) / (pooled.size * width)
    ax.fill_between(mids, dens, color=POOLED_FILL, linewidth=0)
    top = float(dens.max())
    for i, col in enumerate(per_replica):
        hr, _ = np.histogram(col.ravel(), edges)
        dr = _smooth(hr.astype(np.float64)) / (col.size * width)
        ax.plot(mids, dr, color=_colour(i), linewidth=1.1)
        top = max(top, float(dr.max()))
    ax.set_ylim(0, 1.12 * top if top > 0 else 1)
    ax.set_yticks([])
    ax.spines["left"].set_visible(False)
    if ref is not None:
        ax.plot(
            [ref],
            [0],
            marker="^",
            color=REFERENCE_INK,
            markersize=7,
            clip_on=False,
            transform=ax.get_xaxis_transform(),
            zorder=5,
        )


def _lower_panel(
    ax: Any,
    xs: list[npt.NDArray[np.float64]],
    ys: list[npt.NDArray[np.float64]],
    xlim: tuple[float, float],
    ylim: tuple[float, float],
    ref_x: float | None,
    ref_y: float | None,
) -> None:
    xe, ye = np.linspace(*xlim, BINS + 1), np.linspace(*ylim, BINS + 1)
    xm, ym = 0.5 * (xe[1:] + xe[:-1]), 0.5 * (ye[1:] + ye[:-1])
    for i, (x, y) in enumerate(zip(xs, ys, strict=True)):
        h, _, _ = np.histogram2d(x.ravel(), y.ravel(), bins=(xe, ye))
        dens = _smooth(h).T
        levels = region_thresholds(dens, LEVELS)
        if len(levels) == 2 and levels[0] < levels[1]:
            ax.contour(
                xm,
                ym,
                dens,
                levels=levels,
                colors=[_colour(i)],
                linewidths=[0.9, 1.2],
                linestyles=["--", "-"],
            )
    if ref_x is not None and ref_y is not None:
        ax.plot(
            [ref_x],
            [ref_y],
            marker="D",
            markerfacecolor="white",
            markeredgecolor=REFERENCE_INK,
            markeredgewidth=1.3,
            markersize=6,
            linestyle="none",
            zorder=5,
        )
    elif ref_x is not None:
        ax.plot(
            [ref_x],
            [0],
            marker="^",
            color=REFERENCE_INK,
            markersize=5,
            clip_on=False,
            transform=ax.get_xaxis_transform(),
            zorder=5,
        )
    elif ref_y is not None:
        ax.plot(
            [0],
            [ref_y],
            marker=">",
            color=REFERENCE_INK,
            markersize=5,
            clip_on=False,
            transform=ax.get_yaxis_transform(),
            zorder=5,
        )


def _at_spread(value: float, spread: float) -> str:
    """``value`` to the decimals that show three digits of ``spread`` (the 90% interval's
    width): one decimal count for a panel's median and interval, no sign on zero."""
    digits = 2 - int(np.floor(np.log10(spread))) if spread > 0 and np.isfinite(spread) else 3
    text = f"{value:.{max(digits, 0)}f}" if max(digits, 0) <= 12 else f"{value:.3g}"
    return text[1:] if text.startswith("-") and float(text) == 0 else text


def _two(value: float) -> str:
    """Two decimals, without a sign on zero (``0.00``, not ``-0.00``)."""
    text = f"{value:.2f}"
    return "0.00" if text == "-0.00" else text


def _upper_panel(
    ax: Any,
    ys: list[npt.NDArray[np.float64]],
    xs: list[npt.NDArray[np.float64]],
    cmap: Any,
) -> None:
    x = np.concatenate(xs)  # (all walkers, steps)
    y = np.concatenate(ys)
    r, err = correlation_with_mcse(x, y)
    ax.set_xticks([])
    ax.set_yticks([])
    for side in ("left", "bottom"):
        ax.spines[side].set_visible(False)
    if not np.isfinite(r):
        ax.text(
            0.5,
            0.5,
            "r: constant",
            ha="center",
            va="center",
            fontsize=7,
            color=INK,
            transform=ax.transAxes,
        )
        return
    ax.set_facecolor((*cmap(0.5 + 0.5 * r)[:3], 0.35))
    text = f"r = {_two(r)}\n± {err:#.2g} (MCSE)"  # two digits, trailing zero kept
    if len(xs) > 1:
        each = [correlation_with_mcse(a, b)[0] for a, b in zip(xs, ys, strict=True)]
        text += f"\nreplicas {_two(min(each))} to {_two(max(each))}"
    ax.text(
        0.5,
        0.5,
        text,
        ha="center",
        va="center",
        fontsize=7 if len(xs) > 1 else 8,
        color=INK,
        transform=ax.transAxes,
    )


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
