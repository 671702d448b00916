"""The ``chainyard`` command line.

User mistakes print one line per problem (``chainyard: error: ...``) and exit non-zero without
a traceback; see :mod:`chainyard.errors` for the exit codes. Usage mistakes print one line
ending in ``(see chainyard COMMAND --help)`` and exit 2. Anything unexpected is a chainyard
bug: one line ``chainyard: internal error: TYPE: MESSAGE (...)``, exit 70, and the traceback
with ``chainyard --traceback ...`` or ``CHAINYARD_TRACEBACK=1``. The file system refusing a
write (disk full, quota, file-size limit, read-only, I/O error) that escapes the engine and
store ends in one line and exit 8; a reader closing stdout (``| head``) ends quietly.
"""

from __future__ import annotations

import argparse
import errno
import json
import math
import os
import select
import sys
import traceback
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, NoReturn

from chainyard.errors import ChainyardError, ConfigError, TargetsNotMetError

INTERNAL_ERROR = 70
STORAGE_FAULT = 8

__all__ = ["main", "os_error_exit", "report_internal"]


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


def _cmd_schema(args: argparse.Namespace) -> int:
    from chainyard.config import json_schema

    text = json.dumps(json_schema(), indent=2, sort_keys=False)
    if args.output:
        out = Path(args.output)
        if out.is_dir():
            raise ConfigError(f"{out}: --output is a folder; give a file name")
        try:
            out.write_text(text + "\n")
        except OSError as exc:
            if exc.filename is None:
                exc.filename = str(out)
            raise
    else:
        sys.stdout.write(text + "\n")
    return 0


def _cmd_check(args: argparse.Namespace) -> int:
    import numpy as np

    from chainyard.config import load_config
    from chainyard.engine.initial import initial_state
    from chainyard.engine.registry import sampler_kind
    from chainyard.model import load_model

    config = load_config(args.config)
    model = load_model(config)
    _, log_prob, _, redraws = initial_state(config, model, 0)
    finite = log_prob[np.isfinite(log_prob)]
    seen = f"from {finite.min():.6g} to {finite.max():.6g}" if finite.size else "none finite"
    kind = sampler_kind(config.sampler.kind)
    unit = kind.axis
    again = f"; {redraws} {unit} redrawn from -inf" if redraws else ""
    note = kind.preflight(config)  # as sample does (a missing kernel file or function: exit 2)
    kernel = f"; {note}" if note else ""
    print(
        f"{args.config}: valid ({len(config.parameters)} parameters, "
        f"{config.sampler.walkers} {unit}, {config.sampler.steps:,} steps); "
        f"model evaluated at replica 0's {config.sampler.walkers} initial positions: "
        f"log_prob {seen}{again}{kernel}"
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
    from chainyard.analysis.outputs import check_record_path
    from chainyard.analysis.replicas import open_replicas
    from chainyard.analysis.selection_options import selected_stores

    check_record_path(Path(args.out), "--out")
    if args.what == "burn-in":
        if args.burn_in_record or args.thinning_record or args.raw:
            raise ConfigError(
                "decide burn-in: --burn-in-record, --thinning-record and --raw belong to "
                "`decide thinning`; burn-in is decided on the sampled stores as they are"
            )
        stores = open_replicas(args.stores)
        config = _run_config(args, args.stores[0])
        decision = decide_burn_in(stores, config.burn_in)
        kind = "chainyard.burn_in_decision"
        inputs = stores
    else:
        if args.thinning_record:
            raise ConfigError("decide thinning: --thinning-record is what it writes (--out)")
        stores, views, _ = selected_stores(args, for_what="decide thinning on")
        config = _run_config(args, args.stores[0])
        decision = decide_thinning(views, config.thinning)
        kind = "chainyard.thinning_decision"
        inputs = [*stores, *([Path(args.burn_in_record)] if args.burn_in_record else [])]
    write_record(args.out, kind, {"decision": decision.to_dict()}, inputs)
    print(decision.reason)
    return 0


def _cmd_derive(args: argparse.Namespace) -> int:
    from chainyard.analysis import derive_store, read_record
    from chainyard.store import Store

    discard, factor, records = 0, 1, []
    if args.burn_in_record and args.discard is not None:
        raise ConfigError(
            "derive: --discard contradicts --burn-in-record (the recorded cut); give one"
        )
    if not args.burn_in_record and args.discard is None:
        raise ConfigError(
            "derive: give --burn-in-record FILE (from `chainyard decide burn-in`) or "
            "--discard N (steps to drop, decided by you; --discard 0 keeps any burn-in)"
        )
    if args.burn_in_record:
        rec = read_record(args.burn_in_record, "chainyard.burn_in_decision")
        discard = int(rec["decision"]["steps_discarded"])
        records.append(Path(args.burn_in_record))
    else:
        discard = args.discard
    if args.thinning_record:
        rec = read_record(args.thinning_record, "chainyard.thinning_decision")
        factor = int(rec["decision"]["factor"])
        records.append(Path(args.thinning_record))
    source = Store.open(args.source)
    from chainyard.analysis.selection import undecided_burn_in

    # decided here by a record, or upstream (a derived source whose burn-in was decided)
    decided = bool(args.burn_in_record) or (
        "derived" in source.attrs and undecided_burn_in(source.attrs) is None
    )
    store = derive_store(
        source,
        args.out,
        discard=discard,
        factor=factor,
        records=records,
        burn_in_decided=decided,
    )
    how = "" if decided else "; burn-in not decided by a record"
    print(
        f"{args.out}: {store.steps_done:,} steps (discarded {discard:,}, kept every {factor}{how})"
    )
    return 0


def _cmd_diagnose(args: argparse.Namespace) -> int:
    from chainyard.analysis import diagnose, format_table, write_record
    from chainyard.analysis.replicas import open_replicas
    from chainyard.analysis.selection_options import selected_stores

    if args.json:
        from chainyard.analysis.outputs import check_record_path

        check_record_path(Path(args.json), "--json")
    stores, views, selection = selected_stores(args, for_what="diagnose")
    config = _run_config(args, args.stores[0])
    result = diagnose(views, config.targets)
    result["selection"] = selection.description
    if args.reference:
        from chainyard.analysis.diagnose_reference import compare_with_reference

        reference = open_replicas(args.reference)
        result["reference"] = compare_with_reference(
            views, result, reference, ", ".join(args.reference)
        )
    records = [Path(r) for r in (args.burn_in_record, args.thinning_record) if r]
    if args.json:
        write_record(args.json, "chainyard.diagnostics", result, [*stores, *records])
    print(format_table(result, title=args.title or "", selection=selection.description))
    verdict = result["verdict"]
    if args.strict and not verdict["ok"]:
        sys.stdout.flush()
        failed = [name for name, c in verdict["params"].items() if not c["ok"]]
        which = f" ({', '.join(failed)})" if failed else " (the multivariate check)"
        more = verdict.get("more_steps")
        hint = f"; about {more:,} more steps needed" if more else ""
        raise TargetsNotMetError(
            f"targets not met for {len(failed)} of {len(verdict['params'])} "
            f"parameters{which}{hint}; see the table above (--strict)"
        )
    return 0


class _Parser(argparse.ArgumentParser):
    """argparse with one-line usage errors: ``chainyard: error: MSG (see PROG --help)``.

    Option abbreviations are off for this parser and every subparser made from it
    (``--res`` is not ``--restart``): a prefix must never select an option silently.
    """

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        kwargs["allow_abbrev"] = False
        super().__init__(*args, **kwargs)

    def error(self, message: str) -> NoReturn:
        sys.stderr.write(f"chainyard: error: {message} (see {self.prog} --help)\n")
        raise SystemExit(2)


def _int_at_least(low: int) -> Callable[[str], int]:
    """An argparse type: a whole number >= ``low``."""

    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(
                f"must be a whole number >= {low}, got {text!r}"
            ) from None
        if value < low:
            raise argparse.ArgumentTypeError(f"must be >= {low}, got {value}")
        return value

    parse.__name__ = f"whole number >= {low}"
    return parse


def _workers(text: str) -> int | str:
    """An argparse type: a whole number from 1 to MAX_WORKERS, ``auto`` or ``dask://[HOST:PORT]``."""
    if text.strip().lower() == "auto":
        return "auto"
    if text.strip().lower().startswith("dask://"):
        return text.strip()
    from chainyard.engine.pool import MAX_WORKERS

    try:
        value = int(text)
    except ValueError:
        value = 0
    if not 1 <= value <= MAX_WORKERS:
        raise argparse.ArgumentTypeError(
            f"must be a whole number from 1 to {MAX_WORKERS}, auto or dask://HOST:PORT, "
            f"got {text!r}"
        )
    return value


_workers.__name__ = "N, auto or dask://HOST:PORT"


def _positive_seconds(text: str) -> float:
    """An argparse type: a finite number of seconds > 0."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number of seconds, got {text!r}") from None
    if not math.isfinite(value) or value <= 0:
        raise argparse.ArgumentTypeError(f"must be a finite number of seconds > 0, got {text}")
    return value


class _VersionAction(argparse.Action):
    """``--version``: the package version, looked up only when asked for."""

    def __init__(self, option_strings: Sequence[str], dest: str, **kwargs: Any) -> None:
        kwargs.setdefault("help", "show the version and exit")
        super().__init__(option_strings, dest, nargs=0, default=argparse.SUPPRESS, **kwargs)

    def __call__(self, parser: argparse.ArgumentParser, *_: Any, **__: Any) -> NoReturn:
        from chainyard.facts import chainyard_version

        sys.stdout.write(f"chainyard {chainyard_version()}\n")
        parser.exit()


def _parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="chainyard",
        description="Reproducible, resumable MCMC sampling steps for data pipelines.",
    )
    parser.add_argument("--version", action=_VersionAction)
    parser.add_argument("--traceback", action="store_true", help=_TRACEBACK_HELP)
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

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
        type=_positive_seconds,
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

    p = sub.add_parser("decide", help="record a burn-in or thinning decision for a run")
    p.add_argument(
        "what",
        choices=["burn-in", "thinning"],
        help="burn-in: steps to discard, decided on the sampled stores; thinning: the factor, "
        "decided on the stores after burn-in (the config's burn_in/thinning policy)",
    )
    p.add_argument(
        "stores",
        nargs="+",
        help="the run's replica stores: sampled ones for burn-in; for thinning, derived ones "
        "(after burn-in), or sampled ones with --burn-in-record (or --raw)",
    )
    p.add_argument("--out", required=True, help="decision record (JSON) to write")
    p.add_argument(
        "--config", default=None, help="run config with the policy (default: the one stored)"
    )
    from chainyard.analysis.selection_options import add_selection_options

    add_selection_options(p, "thinning: ")
    p.set_defaults(func=_cmd_decide)

    p = sub.add_parser("derive", help="write a store with burn-in discarded and/or thinned")
    p.add_argument("source", help="store to derive from")
    p.add_argument(
        "--out",
        required=True,
        help="derived store to write; only a derived store already there is replaced (the "
        "source, folders holding it, the current folder and anything else are refused)",
    )
    p.add_argument("--burn-in-record", default=None, help="burn-in decision record")
    p.add_argument(
        "--discard",
        type=_int_at_least(0),
        default=None,
        metavar="N",
        help="without a burn-in record: drop the first N steps, decided by you (--discard 0 "
        "keeps every step; the derived store records that burn-in was not decided)",
    )
    p.add_argument("--thinning-record", default=None, help="thinning decision record")
    p.set_defaults(func=_cmd_derive)

    p = sub.add_parser("diagnose", help="convergence diagnostics and verdict for a run")
    p.add_argument(
        "stores",
        nargs="+",
        help="the run's replica stores: derived ones (after burn-in), or sampled ones with "
        "--burn-in-record (or --raw)",
    )
    from chainyard.analysis.selection_options import add_selection_options

    add_selection_options(p, "")
    p.add_argument(
        "--config", default=None, help="run config with the targets (default: the one stored)"
    )
    p.add_argument("--json", default=None, help="also write the diagnostics record here")
    p.add_argument("--title", default=None, help="heading for the table")
    p.add_argument(
        "--strict", action="store_true", help="exit with status 1 when the targets are not met"
    )
    p.add_argument(
        "--reference",
        nargs="+",
        default=None,
        metavar="STORE",
        help="compare the draws with a reference run's stores (e.g. accept-reject) by a "
        "two-sample Kolmogorov-Smirnov test per parameter",
    )
    p.set_defaults(func=_cmd_diagnose)

    p = sub.add_parser(
        "check",
        help="validate a run configuration, load its data and evaluate the model once at "
        "replica 0's initial positions",
    )
    p.add_argument("config", help="run configuration (YAML) to check")
    p.set_defaults(func=_cmd_check)

    p = sub.add_parser("schema", help="print the run configuration's JSON Schema")
    p.add_argument("--output", "-o", default=None, help="write to this file instead")
    p.set_defaults(func=_cmd_schema)

    from chainyard.commands.results import add_commands as add_result_commands
    from chainyard.provenance.commands import add_commands

    add_result_commands(sub)  # export, results-table, plot
    add_commands(sub)  # verify, inspect, pack, unpack, export-prov
    from chainyard.status.command import add_command as add_status_command

    add_status_command(sub)  # status
    for command in sub.choices.values():  # also accepted after the command
        command.add_argument(
            "--traceback", action="store_true", default=argparse.SUPPRESS, help=_TRACEBACK_HELP
        )
    return parser


_TRACEBACK_HELP = (
    "on an internal error, print the traceback (also: environment CHAINYARD_TRACEBACK=1)"
)

#: errno -> what the file system refused (the safety net for faults the store did not name)
_STORAGE_ERRNOS = {
    errno.ENOSPC: ("no space left on the device", "free some space and rerun"),
    errno.EDQUOT: ("disk quota exceeded", "free some of your quota and rerun"),
    errno.EFBIG: ("file too large for the file-size limit", "raise `ulimit -f` and rerun"),
    errno.EROFS: ("read-only file system", "write somewhere writable"),
    errno.EIO: ("input/output error", "check the disk"),
    errno.EACCES: ("permission denied", "check the permissions"),
    errno.EPERM: ("operation not permitted", "check the permissions"),
}


def _say(line: str) -> None:
    """Print one line to stderr (never raises)."""
    try:
        sys.stderr.write(line.replace("\n", " ") + "\n")
        sys.stderr.flush()
    except (OSError, ValueError):
        pass


def _stdout_broken() -> bool:
    """True if the reader of stdout has gone (the write end of a pipe reports an error)."""
    try:
        poller = select.poll()
        poller.register(sys.stdout.fileno(), select.POLLOUT)
        return any(ev & (select.POLLERR | select.POLLHUP) for _, ev in poller.poll(0))
    except (OSError, ValueError, AttributeError):
        return False


def _quiet_exit_on_broken_pipe() -> int:
    """Point stdout at /dev/null so that the interpreter's final flush stays quiet."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):
        pass
    return 0


def os_error_exit(exc: OSError) -> int | None:
    """One line and exit status for a file-system refusal that escaped; None if not one."""
    if exc.errno == errno.ENAMETOOLONG:  # a path given by the user: bad input
        name = os.fsdecode(exc.filename) if exc.filename is not None else ""
        where = f"{name[:80]}{'...' if len(name) > 80 else ''}: " if name else ""
        _say(f"chainyard: error: {where}file name too long (at most 255 bytes per name)")
        return 2
    known = _STORAGE_ERRNOS.get(exc.errno or 0)
    if known is None:
        return None
    what, hint = known
    name = errno.errorcode.get(exc.errno or 0, str(exc.errno))
    where = f"{os.fsdecode(exc.filename)}: " if exc.filename is not None else ""
    if exc.errno in (errno.EACCES, errno.EPERM) and exc.filename is not None:
        path = Path(os.fsdecode(exc.filename))
        if path.exists() and not os.access(path, os.R_OK):  # a read, not a write
            _say(f"chainyard: error: {where}cannot read it: {what} ({name}); {hint}")
            return 4
    _say(f"chainyard: error: {where}the file system refused: {what} ({name}); {hint}")
    return STORAGE_FAULT


def report_internal(exc: BaseException, command: str, show: bool) -> int:
    """Report a chainyard bug in one line (the traceback first when asked for)."""
    if show:
        traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)
    text = (str(exc).strip().splitlines() or [""])[0]
    _say(
        f"chainyard: internal error: {type(exc).__name__}: {text} "
        f"(in 'chainyard {command}'; run with --traceback or CHAINYARD_TRACEBACK=1 "
        "for the traceback)"
    )
    return INTERNAL_ERROR


def _interrupted_class() -> type[BaseException]:
    """The engine's stop-on-signal exception, imported without emcee where possible."""
    try:
        from chainyard.engine.stopping import Interrupted
    except ImportError:  # pragma: no cover - older engine layout
        from chainyard.engine import Interrupted
    return Interrupted


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status (see :mod:`chainyard.errors`)."""
    parser = _parser()
    args = parser.parse_args(argv)
    show = bool(getattr(args, "traceback", False)) or os.environ.get(
        "CHAINYARD_TRACEBACK", ""
    ) not in ("", "0")
    command = str(getattr(args, "command", ""))
    if sys.stdout is None:  # started with stdout closed (`>&-`): results would be lost
        _say("chainyard: error: standard output is closed; redirect it (e.g. > /dev/null)")
        return 2
    try:
        Interrupted = _interrupted_class()

        try:
            code = int(args.func(args))
            sys.stdout.flush()
            return code
        except Interrupted as exc:
            return 128 + exc.signum
    except ChainyardError as exc:
        if show:
            traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)
        for line in str(exc).splitlines() or [type(exc).__name__]:
            _say(f"chainyard: error: {line}")
        return exc.exit_code
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError as exc:
        if _stdout_broken():
            return _quiet_exit_on_broken_pipe()
        return report_internal(exc, command, show)
    except MemoryError as exc:
        if show:
            traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)
        detail = f": {exc}" if str(exc) else ""
        _say(
            f"chainyard: error: 'chainyard {command}' ran out of memory (MemoryError{detail}); "
            "free memory or lower the sizes involved (steps, walkers, chunk_steps)"
        )
        return INTERNAL_ERROR
    except OSError as exc:
        if show:
            traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)
        code = os_error_exit(exc)
        return code if code is not None else report_internal(exc, command, False)
    except Exception as exc:
        return report_internal(exc, command, show)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
