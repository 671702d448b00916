"""The ``status`` view as one self-contained HTML page that reloads itself.

No scripts, fonts, style sheets or images from elsewhere: the style is inline and each run's
plots are inline SVG (progress of every replica over time; the interim verdict's largest
R-hat and smallest bulk ESS against the committed steps, with the targets as dashed lines).
Every text taken from the results folder is escaped.
"""

from __future__ import annotations

import html
import os
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from chainyard.status.collect import STATES, RunStatus
from chainyard.status.render_text import format_duration, format_verdict

__all__ = ["render_html", "write_html"]

_W, _H, _PAD = 180, 60, 4
_COLOURS = {
    "failed": "#c62828",
    "stale lock": "#ef6c00",
    "sampling": "#1565c0",
    "waiting": "#757575",
    "done": "#2e7d32",
}
_STYLE = """
body{font-family:system-ui,sans-serif;margin:1.2em;color:#222}
table{border-collapse:collapse}td,th{padding:.25em .6em;border-bottom:1px solid #ddd;
vertical-align:top;text-align:left}td.n{text-align:right;font-variant-numeric:tabular-nums}
.state{font-weight:600}.reason{color:#555;font-size:.9em;max-width:40em}
svg{background:#fafafa;border:1px solid #eee}small{color:#666}
"""


def _e(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _polyline(points: list[tuple[float, float]], colour: str, dash: bool = False) -> str:
    if len(points) < 2:
        if len(points) == 1:
            x, y = points[0]
            return f'<circle cx="{x:.1f}" cy="{y:.1f}" r="2" fill="{colour}"/>'
        return ""
    coords = " ".join(f"{x:.1f},{y:.1f}" for x, y in points)
    extra = ' stroke-dasharray="3,2"' if dash else ""
    return f'<polyline fill="none" stroke="{colour}" stroke-width="1.5"{extra} points="{coords}"/>'


def _scale(values: list[float], lo: float, hi: float, size: float) -> list[float]:
    span = hi - lo or 1.0
    return [_PAD + (v - lo) / span * (size - 2 * _PAD) for v in values]


def progress_svg(run: RunStatus, now: float) -> str:
    """Committed steps of each replica against time (y: 0 .. steps asked)."""
    series = [r.progress for r in run.replicas if r.progress]
    asked = max([r.steps_asked or 0 for r in run.replicas] + [1])
    label = f"progress of {run.run}"
    body = [f"<title>{_e(label)}</title>"]
    if series:
        t0 = min(p[0] for s in series for p in s)
        t1 = max([now if run.state == "sampling" else 0.0] + [p[0] for s in series for p in s])
        for s in series:
            xs = _scale([p[0] for p in s], t0, max(t1, t0 + 1), _W)
            ys = [_H - y for y in _scale([float(p[1]) for p in s], 0, asked, _H)]
            body.append(_polyline(list(zip(xs, ys, strict=True)), _COLOURS[run.state]))
    else:
        body.append(f'<text x="8" y="{_H / 2 + 4}" font-size="10" fill="#888">no commits</text>')
    return (
        f'<svg class="progress" width="{_W}" height="{_H}" viewBox="0 0 {_W} {_H}" '
        f'role="img" aria-label="{_e(label)}">' + "".join(body) + "</svg>"
    )


def verdict_svg(run: RunStatus, history: dict[int, dict[str, Any]]) -> str:
    """Largest R-hat (red) and smallest bulk ESS (blue, log scale) against committed steps;
    the run's targets dashed."""
    points = sorted(history.items())
    targets = points[-1][1].get("targets") or {} if points else {}
    label = f"R-hat and ESS so far of {run.run}"
    body = [f"<title>{_e(label)}</title>"]
    if not points:
        body.append(
            f'<text x="8" y="{_H / 2 + 4}" font-size="10" fill="#888">no verdict yet</text>'
        )
    else:
        steps = [float(s) for s, _ in points]
        s_hi = max(steps[-1], 1.0)
        xs = _scale(steps, 0.0, s_hi, _W)
        rhat_target = targets.get("max_nested_rhat") or 1.01
        rhats = [
            (x, v["max_rhat"])
            for x, (_, v) in zip(xs, points, strict=True)
            if v.get("max_rhat") is not None
        ]
        if rhats:
            hi = max([rhat_target * 1.02] + [r for _, r in rhats])
            ys = [_H - y for y in _scale([r for _, r in rhats] + [rhat_target], 1.0, hi, _H)]
            body.append(
                _polyline([(x, y) for (x, _), y in zip(rhats, ys, strict=False)], "#c62828")
            )
            body.append(_polyline([(_PAD, ys[-1]), (_W - _PAD, ys[-1])], "#c62828", dash=True))
        ess_target = targets.get("min_ess_bulk") or 400
        ess = [
            (x, v["min_ess_bulk"])
            for x, (_, v) in zip(xs, points, strict=True)
            if v.get("min_ess_bulk")
        ]
        if ess:
            import math

            logs = [math.log10(max(e, 1.0)) for _, e in ess] + [math.log10(ess_target)]
            ys = [_H - y for y in _scale(logs, 0.0, max(logs) * 1.05, _H)]
            body.append(_polyline([(x, y) for (x, _), y in zip(ess, ys, strict=False)], "#1565c0"))
            body.append(_polyline([(_PAD, ys[-1]), (_W - _PAD, ys[-1])], "#1565c0", dash=True))
    return (
        f'<svg class="verdict" width="{_W}" height="{_H}" viewBox="0 0 {_W} {_H}" '
        f'role="img" aria-label="{_e(label)}">' + "".join(body) + "</svg>"
    )


def render_html(
    runs: Sequence[RunStatus],
    results: str,
    *,
    refresh_seconds: float = 10.0,
    history: dict[str, dict[int, dict[str, Any]]] | None = None,
    now: float | None = None,
) -> str:
    """The page: header, counts per state, one table row per run (problems first).

    Parameters
    ----------
    runs : sequence of RunStatus
        Sorted as :func:`chainyard.status.collect.collect` returns them.
    results : str
        The results folder (in the title).
    refresh_seconds : float
        The page reloads itself this often.
    history : dict, optional
        run -> {steps: interim verdict} (:class:`chainyard.status.verdict.VerdictCache`).
    now : float, optional
        Seconds since the epoch shown as the time of the view.
    """
    now = time.time() if now is None else now
    history = history or {}
    stamp = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(now))
    counts = (
        ", ".join(f"{n} {s}" for s in STATES if (n := sum(r.state == s for r in runs)))
        or "no runs found"
    )
    total = sum(r.steps_done for r in runs)
    rows = []
    for r in runs:
        pct = f" ({100.0 * r.steps_done / r.steps_asked:.0f}%)" if r.steps_asked else ""
        asked = f"{r.steps_asked:,}" if r.steps_asked else "?"
        rate = "-" if r.steps_per_second is None else f"{r.steps_per_second:,.1f}"
        reason = f'<div class="reason">{_e(r.reason)}</div>' if r.reason else ""
        rows.append(
            f'<tr class="run" data-run="{_e(r.run)}" data-state="{_e(r.state)}" '
            f'data-steps-done="{r.steps_done}">'
            f"<td>{_e(r.run)}</td>"
            f'<td><span class="state" style="color:{_COLOURS[r.state]}">{_e(r.state)}</span>'
            f"{reason}</td>"
            f'<td class="n steps">{r.steps_done:,} / {asked}{pct}</td>'
            f'<td class="n">{rate}</td><td class="n">{format_duration(r.eta_seconds)}</td>'
            f"<td>{_e(format_verdict(r.verdict))}</td>"
            f"<td>{progress_svg(r, now)}</td>"
            f"<td>{verdict_svg(r, history.get(r.run, {}))}</td></tr>"
        )
    refresh = max(1, round(refresh_seconds))
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f'<meta http-equiv="refresh" content="{refresh}">'
        f"<title>chainyard status: {total:,} steps committed; {_e(counts)}</title>"
        f"<style>{_STYLE}</style></head><body>"
        f"<h1>chainyard status</h1><p>{_e(results)}: {len(runs)} runs: {_e(counts)}. "
        f'<small>As of <span id="as-of">{stamp}</span>; this page reloads every {refresh} s.'
        "</small></p>"
        "<table><thead><tr><th>run</th><th>state</th><th>steps committed / asked</th>"
        "<th>steps/s</th><th>ETA</th><th>verdict (interim)</th><th>progress</th>"
        "<th>R-hat (red) / ESS (blue) so far</th></tr></thead><tbody>"
        + "".join(rows)
        + "</tbody></table><p><small>Interim verdict: the second half of the committed steps "
        "(at most 500 of them per replica) against the run's targets; dashed lines are the "
        "targets. The final verdict uses the run's burn-in and thinning.</small></p>"
        "</body></html>\n"
    )


def write_html(path: Path, text: str) -> None:
    """Write the page atomically (a reloading browser never sees half a page)."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.partial")
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
