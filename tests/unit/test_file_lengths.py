"""Source files stay short: at most about 400 lines each, or a stated reason.

A long file is usually several responsibilities in one place; splitting it along them keeps
each easy to read and change (common practice, no source). The limit counts every line of
a module under ``plugin/chainyard/``; a file may exceed it only when listed in ``LONGER``
with the reason, and a listed file that is short again must leave the list.
"""

from __future__ import annotations

from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[2] / "plugin" / "chainyard"
MAX_LINES = 400

#: files allowed above MAX_LINES, with the reason (path relative to the package)
LONGER: dict[str, str] = {}


def _lengths() -> dict[str, int]:
    return {
        str(p.relative_to(PACKAGE)): len(p.read_text().splitlines())
        for p in sorted(PACKAGE.rglob("*.py"))
    }


def test_source_files_are_short() -> None:
    """Every module is at most MAX_LINES lines, or listed in LONGER with a reason."""
    long = {name: n for name, n in _lengths().items() if n > MAX_LINES and name not in LONGER}
    assert not long, f"files over {MAX_LINES} lines (split them or state why): {long}"


def test_exceptions_are_still_needed() -> None:
    """A file listed in LONGER is still long and still exists."""
    lengths = _lengths()
    stale = [name for name in LONGER if lengths.get(name, 0) <= MAX_LINES]
    assert not stale, f"no longer long (remove from LONGER): {stale}"
