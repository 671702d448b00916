"""The ``sample`` command: create, resume or extend a run's replica stores.

The parser is declared cheaply; the engine (and, for ``--until-targets``, the analysis) is
imported when the command runs.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from chainyard.argtypes import positive_seconds
from chainyard.commands.parsing import _int_at_least, _workers
from chainyard.errors import ConfigError, TargetsNotMetError

__all__ = ["add_command"]


def _cmd_sample(args: argparse.Namespace) -> int:
    from chainyard.workflow.imports import import_emcee_without_kde

    import_emcee_without_kde()  # emcee's KDE-only scipy.stats import is ~0.6 s of start-up
    from chainyard.config import load_config
    from chainyard.engine import sample

    REPLICA_FIELD = "{replica}"  # chainyard.analysis.until's, imported for --until-targets only

    config = load_config(args.config)
    if args.steps is not None:
        config = config.with_steps(args.steps)
    kwargs = dict(
        restart=args.restart,
        progress=args.progress,
        progress_interval=args.progress_interval,
        workers=args.workers,
        cpus=args.cpus,
    )
    templated = REPLICA_FIELD in args.out
    if args.replicas is not None:
        from chainyard.engine.replicas import check_replicas_option

        check_replicas_option(args.out, args.replicas, args.replica)
    if not args.until_targets:
        if args.replicas is not None:
            from chainyard.engine.replicas import sample_replicas

            sample_replicas(config, args.out, args.replicas, **kwargs)
            return 0
        if templated and args.replica is None and config.replicas > 1:
            print(
                f"note: sampling replica 0 only of {config.replicas}; --replicas "
                f"{config.replicas} samples them all",
                file=sys.stderr,
            )
        replica = args.replica or 0
        out = args.out.replace(REPLICA_FIELD, str(replica))
        sample(config, out, replica=replica, **kwargs)
        return 0
    from chainyard.analysis.until import replica_paths, sample_until_targets

    if templated:  # every replica of the run, extended in turn, judged together
        count = args.replicas or config.replicas
        paths = replica_paths(args.out, count)
        indices = list(range(count))
    elif config.replicas > 1:
        raise ConfigError(
            f"--until-targets judges the whole run ({config.replicas} replicas): give --out "
            f"with {REPLICA_FIELD} (e.g. --out run/r{REPLICA_FIELD}.zarr) so that every "
            "replica is extended and diagnosed together"
        )
    else:
        paths, indices = [Path(args.out)], [args.replica or 0]
    store, met = sample_until_targets(config, paths, indices, **kwargs)
    if not met:
        raise TargetsNotMetError(
            f"targets not met after {store.steps_done:,} steps (budget spent); "
            f"see {paths[0]}/target_checks.json"
        )
    return 0


def add_command(sub: Any) -> None:
    """Add ``sample`` to the ``chainyard`` subcommands (imports nothing heavy)."""
    p = sub.add_parser(
        "sample", help="create, resume or extend one replica's store (all: --replicas N)"
    )
    p.add_argument("config", help="run configuration (YAML)")
    p.add_argument("--out", required=True, help="store directory to create or continue")
    p.add_argument(
        "--replica", type=_int_at_least(0), default=None, help="replica index (default 0)"
    )
    p.add_argument(
        "--replicas",
        type=_int_at_least(1),
        default=None,
        metavar="N",
        help="sample replicas 0 to N-1 one after the other; --out must hold {replica} "
        "(e.g. --out 'run/replica-{replica}.zarr')",
    )
    p.add_argument(
        "--steps",
        type=_int_at_least(1),
        default=None,
        help="override sampler.steps (e.g. to extend a finished run)",
    )
    p.add_argument(
        "--until-targets",
        action="store_true",
        help="extend until the run's targets (nested R-hat, steps per tau, ESS: the verdict of "
        "`chainyard diagnose`) hold, checking every extend_until_targets.check_every steps up "
        "to its max_steps/max_seconds (a required config section; exit 1 when that budget is "
        "spent); with "
        "replicas > 1 give --out with {replica} (run/r{replica}.zarr): every replica is "
        "extended in turn and the verdict is diagnose's, across all replicas",
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
        type=positive_seconds,
        default=10.0,
        metavar="SECONDS",
        help="seconds between progress log lines (default 10)",
    )
    p.add_argument(
        "--workers",
        type=_workers,
        default=1,
        metavar="N|auto|dask://HOST:PORT",
        help="worker processes evaluating the walkers' log-probabilities (default 1: this "
        "process); auto: up to --cpus, only where timing the first model calls shows it pays; "
        "dask://HOST:PORT (or dask:// with DASK_SCHEDULER_ADDRESS): the workers of a running "
        "Dask cluster. The draws are the same for any count",
    )
    p.add_argument(
        "--cpus",
        type=_int_at_least(1),
        default=None,
        metavar="N",
        help="CPUs this run may use (default: those the process may run on): caps auto and "
        "the BLAS/OpenMP threads of each worker (cpus // workers)",
    )
    p.set_defaults(func=_cmd_sample)
