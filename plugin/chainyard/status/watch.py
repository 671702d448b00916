"""One ``status`` view or a refreshing one: collect, add verdicts and speeds, print, write HTML."""

from __future__ import annotations

import json
import sys
import time
from collections import deque
from pathlib import Path
from typing import Any

from chainyard.errors import ConfigError
from chainyard.status.collect import RunStatus, collect, eta_seconds
from chainyard.status.render_html import render_html, write_html
from chainyard.status.render_text import render_text

__all__ = ["RateTracker", "planned_runs", "run_status"]

#: the speed shown while watching is measured over about this many seconds of commits
RATE_WINDOW_SECONDS = 300.0


def planned_runs(config: Path) -> dict[str, tuple[int, int]]:
    """run -> (replicas, steps asked) from a workflow config file (exit 2 when invalid)."""
    from chainyard.config.yamlfile import read_yaml_file
    from chainyard.workflow.config import load_workflow_config

    data = read_yaml_file(config, "workflow config file")
    entries = load_workflow_config(data, source=str(config))
    return {
        name: (int(e.config.replicas), int(e.config.sampler.steps)) for name, e in entries.items()
    }


class RateTracker:
    """Recent steps/s per replica from the commits seen between refreshes.

    A replica's committed steps are noted at each refresh; its speed is the growth over the
    last :data:`RATE_WINDOW_SECONDS` (from the commit times the stores record). Until two
    commits were seen, the speed of the replica's current segment (from its commit record)
    stands.
    """

    def __init__(self) -> None:
        self._seen: dict[tuple[str, int], deque[tuple[float, int]]] = {}

    def update(self, runs: list[RunStatus]) -> None:
        """Note the latest commits and replace the speeds where there is a recent one."""
        for run in runs:
            for r in run.replicas:
                if r.updated is None:
                    continue
                seen = self._seen.setdefault((run.run, r.replica), deque())
                if not seen or seen[-1][1] != r.steps_done:
                    seen.append((r.updated, r.steps_done))
                while len(seen) > 2 and seen[-1][0] - seen[0][0] > RATE_WINDOW_SECONDS:
                    seen.popleft()
                if r.state == "sampling" and len(seen) >= 2:
                    (t0, s0), (t1, s1) = seen[0], seen[-1]
                    if t1 > t0 and s1 > s0:
                        r.steps_per_second = (s1 - s0) / (t1 - t0)
            speeds = [r.steps_per_second for r in run.replicas if r.steps_per_second]
            run.steps_per_second = sum(speeds) if speeds else None
            run.eta_seconds = eta_seconds(run.replicas)


def _newer(record: Path, run: RunStatus) -> bool:
    """True if ``record`` exists and was written after the run's last commit."""
    try:
        written = record.stat().st_mtime
    except OSError:
        return False
    return all(r.updated is None or written >= r.updated - 1.0 for r in run.replicas)


def _view(
    results: Path,
    planned: dict[str, tuple[int, int]] | None,
    stale_after: float | None,
    verdicts: Any,
    rates: RateTracker,
    with_history: bool,
) -> list[RunStatus]:
    runs = collect(results, planned=planned, stale_after=stale_after)
    rates.update(runs)
    if verdicts is not None:
        from chainyard.status.verdict import final_verdict

        for run in runs:
            record = results / run.run / "diagnostics.json"
            if run.state == "done" and _newer(record, run):
                run.verdict = final_verdict(record)
                if run.verdict is not None:
                    per_replica = run.steps_done // max(len(run.replicas), 1)
                    verdicts.history.setdefault(run.run, {})[per_replica] = run.verdict
                    continue
            stores = [r.store for r in run.replicas if r.store is not None]
            if stores:
                common = min(r.steps_done for r in run.replicas if r.store is not None)
                run.verdict = verdicts.get(run.run, stores, common, with_history=with_history)
    return runs


def run_status(
    results: Path,
    *,
    config: Path | None = None,
    as_json: bool = False,
    watch: float | None = None,
    html: Path | None = None,
    stale_after: float | None = None,
    verdicts: bool = True,
) -> int:
    """``chainyard status``: print the view (text or JSON), once or every ``watch`` seconds.

    Returns the exit status (0; 130 is left to the command line on Ctrl-C, which ends a
    watch quietly here).
    """
    if not results.is_dir() and config is None:  # with the config: nothing started yet
        raise ConfigError(f"{results}: no such results folder (give the workflow's results/)")
    if html is not None and html.is_dir():
        raise ConfigError(f"{html}: --html is a folder; give a file name (e.g. status.html)")
    if html is not None and not html.absolute().parent.is_dir():
        raise ConfigError(f"{html}: --html: the folder {html.absolute().parent} does not exist")
    planned = planned_runs(config) if config is not None else None
    from chainyard.status.verdict import VerdictCache

    cache = VerdictCache() if verdicts else None
    rates = RateTracker()
    tty = sys.stdout.isatty()
    try:
        while True:
            runs = _view(results, planned, stale_after, cache, rates, html is not None)
            if as_json:
                text = json.dumps([r.to_json() for r in runs], indent=None if watch else 2)
                sys.stdout.write(text + "\n")
            else:
                text = render_text(runs, str(results))
                if watch and tty:
                    sys.stdout.write("\x1b[H\x1b[2J")  # home and clear: refresh in place
                elif watch:
                    sys.stdout.write("\n")
                sys.stdout.write(text)
            sys.stdout.flush()
            if html is not None:
                page = render_html(
                    runs,
                    str(results),
                    refresh_seconds=watch or 10.0,
                    history=cache.history if cache is not None else None,
                )
                write_html(html, page)
            if watch is None:
                return 0
            time.sleep(watch)
    except KeyboardInterrupt:
        return 0
