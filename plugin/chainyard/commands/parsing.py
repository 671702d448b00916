"""Pieces of the command line's argument parsing: the parser class, argument types and
``--version``.

Usage mistakes end in one line, ``chainyard: error: MSG (see PROG --help)``, and exit 2.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence
from typing import Any, NoReturn


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


class _VersionAction(argparse.Action):
    """``--version``: the package version, looked up only when asked for."""

    def __init__(self, option_strings: Sequence[str], dest: str, **kwargs: Any) -> None:
        kwargs.setdefault("help", "show the version and exit")
        super().__init__(option_strings, dest, nargs=0, default=argparse.SUPPRESS, **kwargs)

    def __call__(self, parser: argparse.ArgumentParser, *_: Any, **__: Any) -> NoReturn:
        from chainyard.facts import chainyard_version

        sys.stdout.write(f"chainyard {chainyard_version()}\n")
        parser.exit()
