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
from typing import Any

from chainyard.errors import ChainyardError

__all__ = ["main"]


def _cmd_sample(args: argparse.Namespace) -> int:
    from chainyard.config import load_config
    from chainyard.engine import sample

    config = load_config(args.config)
    if args.steps is not None:
        config = config.with_steps(args.steps)
    kwargs = dict(
        replica=args.replica,
        restart=args.restart,
        progress=args.progress,
        progress_interval=args.progress_interval,
    )
    if not args.until_targets:
        sample(config, args.out, **kwargs)
        return 0
    from chainyard.analysis.until import sample_until_targets

    store, met = sample_until_targets(config, args.out, **kwargs)
    if not met:
        print(
            f"chainyard: targets not met after {store.steps_done:,} steps (budget spent); "
            f"see {args.out}/target_checks.json",
            file=sys.stderr,
        )
        return 1
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


def _run_config(args: argparse.Namespace, first_store: str) -> Any:
    """The run config from --config, else the one stored with the first store."""
    from chainyard.config import load_config
    from chainyard.store import Store

    if args.config:
        return load_config(args.config)
    return Store.open(first_store).config


def _cmd_decide(args: argparse.Namespace) -> int:
    from chainyard.analysis import decide_burn_in, decide_thinning, write_record
    from chainyard.analysis.replicas import open_replicas

    stores = open_replicas(args.stores)
    config = _run_config(args, args.stores[0])
    if args.what == "burn-in":
        decision = decide_burn_in(stores, config.burn_in)
        kind = "chainyard.burn_in_decision"
    else:
        decision = decide_thinning(stores, config.thinning)
        kind = "chainyard.thinning_decision"
    write_record(args.out, kind, {"decision": decision.to_dict()}, stores)
    print(decision.reason)
    return 0


def _cmd_derive(args: argparse.Namespace) -> int:
    from chainyard.analysis import derive_store, read_record
    from chainyard.store import Store

    discard, factor, records = 0, 1, []
    if args.burn_in_record:
        rec = read_record(args.burn_in_record, "chainyard.burn_in_decision")
        discard = int(rec["decision"]["steps_discarded"])
        records.append(Path(args.burn_in_record))
    if args.thinning_record:
        rec = read_record(args.thinning_record, "chainyard.thinning_decision")
        factor = int(rec["decision"]["factor"])
        records.append(Path(args.thinning_record))
    store = derive_store(
        Store.open(args.source), args.out, discard=discard, factor=factor, records=records
    )
    print(f"{args.out}: {store.steps_done:,} steps (discarded {discard:,}, kept every {factor})")
    return 0


def _cmd_diagnose(args: argparse.Namespace) -> int:
    from chainyard.analysis import diagnose, format_table, write_record
    from chainyard.analysis.replicas import open_replicas

    stores = open_replicas(args.stores)
    config = _run_config(args, args.stores[0])
    result = diagnose(stores, config.targets)
    if args.json:
        write_record(args.json, "chainyard.diagnostics", result, stores)
    print(format_table(result, title=args.title or ""))
    if args.strict and not result["verdict"]["ok"]:
        return 1
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
        "--until-targets",
        action="store_true",
        help="extend until the per-replica targets hold (see extend_until_targets)",
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

    p = sub.add_parser("decide", help="record a burn-in or thinning decision for a run")
    p.add_argument("what", choices=["burn-in", "thinning"])
    p.add_argument("stores", nargs="+", help="the run's replica stores")
    p.add_argument("--out", required=True, help="decision record (JSON) to write")
    p.add_argument(
        "--config", default=None, help="run config with the policy (default: the one stored)"
    )
    p.set_defaults(func=_cmd_decide)

    p = sub.add_parser("derive", help="write a store with burn-in discarded and/or thinned")
    p.add_argument("source", help="store to derive from")
    p.add_argument("--out", required=True, help="derived store to write (replaced)")
    p.add_argument("--burn-in-record", default=None, help="burn-in decision record")
    p.add_argument("--thinning-record", default=None, help="thinning decision record")
    p.set_defaults(func=_cmd_derive)

    p = sub.add_parser("diagnose", help="convergence diagnostics and verdict for a run")
    p.add_argument("stores", nargs="+", help="the run's replica stores (after burn-in)")
    p.add_argument(
        "--config", default=None, help="run config with the targets (default: the one stored)"
    )
    p.add_argument("--json", default=None, help="also write the diagnostics record here")
    p.add_argument("--title", default=None, help="heading for the table")
    p.add_argument(
        "--strict", action="store_true", help="exit with status 1 when the targets are not met"
    )
    p.set_defaults(func=_cmd_diagnose)

    p = sub.add_parser("check", help="validate a run configuration and load its model")
    p.add_argument("config")
    p.set_defaults(func=_cmd_check)

    p = sub.add_parser("schema", help="print the run configuration's JSON Schema")
    p.add_argument("--output", "-o", default=None, help="write to this file instead")
    p.set_defaults(func=_cmd_schema)

    from chainyard.provenance.commands import add_commands

    add_commands(sub)  # verify, inspect, pack, unpack, export-prov
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
