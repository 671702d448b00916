"""The ``chainyard status`` command: declared cheaply, its work imported when it runs."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from chainyard.argtypes import positive_seconds

__all__ = ["add_command"]


def add_command(sub: Any) -> None:
    """Register ``status`` on the ``chainyard`` sub-parsers (imports nothing heavy)."""
    p = sub.add_parser(
        "status",
        help="where every run of a workflow stands: state, steps, speed, ETA, interim verdict",
        description="Read a workflow's results folder (committed data only, no locks) and list "
        "every run: state (failed, stale lock, sampling, waiting, done; problems first), steps "
        "committed of steps asked, recent steps/s, ETA and an interim verdict.",
    )
    p.add_argument("results", metavar="RESULTS_DIR", help="the workflow's results folder")
    p.add_argument(
        "--config",
        default=None,
        metavar="FILE",
        help="the workflow config: also list runs not started yet, with their replicas and "
        "steps (run from the workflow's folder)",
    )
    p.add_argument("--json", action="store_true", help="print a JSON list, one object per run")
    p.add_argument(
        "--watch",
        nargs="?",
        const=5.0,
        default=None,
        type=positive_seconds,
        metavar="SECONDS",
        help="refresh in place every SECONDS (default 5) until interrupted",
    )
    p.add_argument(
        "--html",
        default=None,
        metavar="FILE",
        help="also write the view as a self-contained HTML page that reloads itself (with "
        "--watch: rewritten at every refresh)",
    )
    p.add_argument(
        "--stale-after",
        type=positive_seconds,
        default=None,
        metavar="SECONDS",
        help="a writer on another host that has not committed for this long counts as gone "
        "(default: ten of the run's commit intervals, at least 600 s)",
    )
    p.add_argument(
        "--no-verdict",
        action="store_true",
        help="skip the interim verdict (reads only commit records)",
    )
    p.set_defaults(func=_cmd_status)


def _cmd_status(args: argparse.Namespace) -> int:
    from chainyard.status.watch import run_status

    return run_status(
        Path(args.results),
        config=Path(args.config) if args.config else None,
        as_json=args.json,
        watch=args.watch,
        html=Path(args.html) if args.html else None,
        stale_after=args.stale_after,
        verdicts=not args.no_verdict,
    )
