"""The ``status`` table as text: one line per run, problems first, reasons beneath."""

from __future__ import annotations

import time
from collections.abc import Sequence
from typing import Any

from chainyard.status.collect import STATES, RunStatus

__all__ = ["format_duration", "format_verdict", "render_text"]


def format_duration(seconds: float | None) -> str:
    """``1h02m``, ``3m05s``, ``42s``; ``-`` when unknown."""
    if seconds is None:
        return "-"
    s = round(seconds)
    if s >= 3600:
        return f"{s // 3600}h{(s % 3600) // 60:02d}m"
    if s >= 60:
        return f"{s // 60}m{s % 60:02d}s"
    return f"{s}s"


def format_verdict(verdict: dict[str, Any] | None) -> str:
    """``ok``/``not yet`` (``ok (final)``/``failed (final)`` from the run's diagnostics record)
    with the worst R-hat and ESS (``-`` before there is a verdict)."""
    if verdict is None:
        return "-"
    head = "ok" if verdict["ok"] else "not yet"
    if verdict.get("final"):
        head = "ok (final)" if verdict["ok"] else "failed (final)"
    rhat, ess = verdict.get("max_rhat"), verdict.get("min_ess_bulk")
    parts = [head]
    if rhat is not None:
        parts.append(f"R-hat {rhat:.3f}")
    if ess is not None:
        parts.append(f"ESS {ess:,.0f}")
    return ", ".join(parts)


def _steps(run: RunStatus) -> str:
    if run.steps_asked:
        pct = 100.0 * run.steps_done / run.steps_asked
        return f"{run.steps_done:,}/{run.steps_asked:,} ({pct:.0f}%)"
    return f"{run.steps_done:,}/?"


def _rate(run: RunStatus) -> str:
    return "-" if run.steps_per_second is None else f"{run.steps_per_second:,.1f}"


def render_text(runs: Sequence[RunStatus], results: str, now: float | None = None) -> str:
    """The table: a header with counts per state, then one line per run (problems first).

    Parameters
    ----------
    runs : sequence of RunStatus
        As :func:`chainyard.status.collect.collect` returns them (sorted).
    results : str
        The results folder (named in the header).
    now : float, optional
        Time shown in the header (seconds since the epoch).
    """
    now = time.time() if now is None else now
    counts = {s: sum(r.state == s for r in runs) for s in STATES}
    summary = ", ".join(f"{n} {s}" for s, n in counts.items() if n) or "no runs found"
    stamp = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(now))
    lines = [f"{results}: {len(runs)} runs: {summary} ({stamp})"]
    if not runs:
        return "\n".join(lines) + "\n"
    header = ("RUN", "STATE", "STEPS", "STEPS/S", "ETA", "VERDICT (interim)")
    rows = [
        (
            r.run,
            r.state,
            _steps(r),
            _rate(r),
            format_duration(r.eta_seconds),
            format_verdict(r.verdict),
        )
        for r in runs
    ]
    widths = [max(len(h), *(len(row[i]) for row in rows)) for i, h in enumerate(header)]
    fmt = "  ".join(f"{{:{'>' if i in (2, 3, 4) else '<'}{w}}}" for i, w in enumerate(widths))
    lines.append(fmt.format(*header).rstrip())
    for run, row in zip(runs, rows, strict=True):
        lines.append(fmt.format(*row).rstrip())
        if run.reason:
            lines.append(f"    {run.reason}")
    return "\n".join(lines) + "\n"
