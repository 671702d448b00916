"""The ``chainyard`` command line.

User mistakes print one line per problem (``chainyard: error: ...``) and exit non-zero without
a traceback; see :mod:`chainyard.errors` for the exit codes. Usage mistakes print one line
ending in ``(see chainyard COMMAND --help)`` and exit 2. Anything unexpected is a chainyard
bug: one line ``chainyard: internal error: TYPE: MESSAGE (...)``, exit 70, and the traceback
with ``chainyard --traceback ...`` or ``CHAINYARD_TRACEBACK=1``. The file system refusing a
write (disk full, quota, file-size limit, read-only, I/O error) that escapes the engine and
store ends in one line and exit 8; a reader closing stdout (``| head``) ends quietly.

This module assembles the parser from the commands' own modules (most in
:mod:`chainyard.commands`) and runs the command given; :mod:`chainyard.commands.exits` turns
an error that escaped it into its line and exit status.
"""

from __future__ import annotations

import argparse
import os
import sys
import traceback
from collections.abc import Sequence

from chainyard.commands.exits import (
    INTERNAL_ERROR,
    STORAGE_FAULT,  # noqa: F401 - re-exported (the exit status of a refused write)
    _interrupted_class,
    _quiet_exit_on_broken_pipe,
    _say,
    _stdout_broken,
    os_error_exit,
    report_internal,
)
from chainyard.commands.parsing import _Parser, _VersionAction
from chainyard.errors import ChainyardError

__all__ = ["main", "os_error_exit", "report_internal"]


def _parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="chainyard",
        description="Reproducible, resumable MCMC sampling steps for data pipelines.",
    )
    parser.add_argument("--version", action=_VersionAction)
    parser.add_argument("--traceback", action="store_true", help=_TRACEBACK_HELP)
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    from chainyard.commands.configuration import add_commands as add_config_commands
    from chainyard.commands.decisions import add_commands as add_decision_commands
    from chainyard.commands.results import add_commands as add_result_commands
    from chainyard.commands.sample import add_command as add_sample_command
    from chainyard.provenance.commands import add_commands
    from chainyard.status.command import add_command as add_status_command

    add_sample_command(sub)  # sample
    add_decision_commands(sub)  # decide, derive, diagnose
    add_config_commands(sub)  # check, schema
    add_result_commands(sub)  # export, results-table, plot
    add_commands(sub)  # verify, inspect, pack, unpack, export-prov
    add_status_command(sub)  # status
    for command in sub.choices.values():  # also accepted after the command
        command.add_argument(
            "--traceback", action="store_true", default=argparse.SUPPRESS, help=_TRACEBACK_HELP
        )
    return parser


_TRACEBACK_HELP = (
    "on an internal error, print the traceback (also: environment CHAINYARD_TRACEBACK=1)"
)


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
