"""The panels of the pairs figure: a density on the diagonal, density regions below it, the
correlation with its MCSE above it, and the reference values' markers.

Each function draws into one matplotlib Axes it is given; the figure and its grid are made in
:mod:`chainyard.report.pairs`.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

from chainyard.report.pairs_density import (
    BINS,
    LEVELS,
    _smooth,
    correlation_with_mcse,
    region_thresholds,
)
from chainyard.report.plots import INK, _colour

__all__ = ["POOLED_FILL", "REFERENCE_INK"]

REFERENCE_INK = "#111111"
POOLED_FILL = "#d9d9d9"


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
