"""The ``chainyard`` command line.

User mistakes print one line per problem (``chainyard: error: ...``) and exit non-zero without
a traceback; see :mod:`chainyard.errors` for the exit codes.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from pathlib import Path

from chainyard.errors import ChainyardError

__all__ = ["main"]


def _cmd_sample(args: argparse.Namespace) -> int:
    from chainyard.config import load_config
    from chainyard.engine import sample

    config = load_config(args.config)
    if args.steps is not None:
        config = config.with_steps(args.steps)
    sample(
        config,
        args.out,
        replica=args.replica,
        restart=args.restart,
        progress=args.progress,
        progress_interval=args.progress_interval,
    )
    return 0


def _cmd_schema(args: argparse.Namespace) -> int:
    from chainyard.config import json_schema

    text = json.dumps(json_schema(), indent=2, sort_keys=False)
    if args.output:
        Path(args.output).write_text(text + "\n")
    else:
        sys.stdout.write(text + "\n")
    return 0


def _cmd_check(args: argparse.Namespace) -> int:
    from chainyard.config import load_config
    from chainyard.model import load_model

    config = load_config(args.config)
    load_model(config)
    print(
        f"{args.config}: valid ({len(config.parameters)} parameters, "
        f"{config.sampler.walkers} walkers, {config.sampler.steps:,} steps)"
    )
    return 0


def _parser() -> argparse.ArgumentParser:
    from chainyard import __version__

    parser = argparse.ArgumentParser(
        prog="chainyard",
        description="Reproducible, resumable MCMC sampling steps for data pipelines.",
    )
    parser.add_argument("--version", action="version", version=f"chainyard {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("sample", help="create, resume or extend one replica's store")
    p.add_argument("config", help="run configuration (YAML)")
    p.add_argument("--out", required=True, help="store directory to create or continue")
    p.add_argument("--replica", type=int, default=0, help="replica index (default 0)")
    p.add_argument(
        "--steps",
        type=int,
        default=None,
        help="override sampler.steps (e.g. to extend a finished run)",
    )
    p.add_argument(
        "--restart", action="store_true", help="discard an existing store at --out and start over"
    )
    p.add_argument(
        "--progress",
        choices=["auto", "bar", "log", "off"],
        default="auto",
        help="progress display (auto: bar on a terminal, log lines otherwise)",
    )
    p.add_argument(
        "--progress-interval",
        type=float,
        default=10.0,
        metavar="SECONDS",
        help="seconds between progress log lines (default 10)",
    )
    p.set_defaults(func=_cmd_sample)

    p = sub.add_parser("check", help="validate a run configuration and load its model")
    p.add_argument("config")
    p.set_defaults(func=_cmd_check)

    p = sub.add_parser("schema", help="print the run configuration's JSON Schema")
    p.add_argument("--output", "-o", default=None, help="write to this file instead")
    p.set_defaults(func=_cmd_schema)

    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    from chainyard.engine import Interrupted

    parser = _parser()
    args = parser.parse_args(argv)
    if getattr(args, "replica", 0) is not None and getattr(args, "replica", 0) < 0:
        parser.error("--replica must be >= 0")
    if getattr(args, "steps", None) is not None and args.steps < 1:
        parser.error("--steps must be >= 1")
    try:
        return int(args.func(args))
    except ChainyardError as exc:
        for line in str(exc).splitlines() or [type(exc).__name__]:
            print(f"chainyard: error: {line}", file=sys.stderr)
        return exc.exit_code
    except Interrupted as exc:
        return 128 + exc.signum
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
