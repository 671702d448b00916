"""The commands and links in README.md and docs/*.md are ones that exist.

Every ``chainyard ...`` line of a shell code block (fences without a language, ``bash``,
``sh``, ``shell`` or ``console``; not ``yaml`` or ``python``) is parsed by the real argument
parser, ``chainyard.cli._parser()``, without running it, so a renamed command or option
fails here. Every relative Markdown link must name an existing file. README.md stays short.
Checking documented commands against the parser is common practice, no source.
"""

from __future__ import annotations

import contextlib
import io
import re
import shlex
from pathlib import Path

import pytest

from chainyard import cli

ROOT = Path(__file__).resolve().parents[2]
PAGES = [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md"))]
SHELL_FENCES = {"", "bash", "sh", "shell", "console"}
README_MAX_LINES = 250


def shell_commands(text: str) -> list[tuple[int, str]]:
    """``(line number, command)`` for every ``chainyard`` command of the shell code blocks:
    a leading ``$ `` dropped, lines ending in ``\\`` joined, trailing `` # comments`` dropped."""
    found: list[tuple[int, str]] = []
    lines = text.splitlines()
    fence: str | None = None
    i = 0
    while i < len(lines):
        stripped = lines[i].strip()
        if stripped.startswith("```"):
            fence = None if fence is not None else stripped[3:].strip().lower()
            i += 1
            continue
        if fence is None or fence not in SHELL_FENCES:
            i += 1
            continue
        start = i
        line = stripped
        while line.endswith("\\") and i + 1 < len(lines):
            i += 1
            line = line[:-1] + " " + lines[i].strip()
        i += 1
        line = re.split(r"\s+#\s", line, maxsplit=1)[0].strip()
        if line.startswith("$ "):
            line = line[2:].strip()
        if line.startswith("chainyard "):
            found.append((start + 1, line))
    return found


def optional_parts_removed(words: list[str]) -> list[str]:
    """The words without ``[...]`` groups (optional parts shown in a usage line)."""
    out: list[str] = []
    depth = 0
    for word in words:
        depth += word.count("[")
        if depth == 0:
            out.append(word)
        depth -= word.count("]")
    return out


COMMANDS = [
    pytest.param(page, number, command, id=f"{page.name}:{number}")
    for page in PAGES
    for number, command in shell_commands(page.read_text())
]


def test_commands_are_found() -> None:
    """The extraction sees commands on the README and on the docs pages, so the parse test
    below cannot pass on an empty list."""
    pages = {param.values[0].name for param in COMMANDS}
    assert "README.md" in pages and len(pages) >= 5 and len(COMMANDS) >= 20


@pytest.mark.parametrize(("page", "number", "command"), COMMANDS)
def test_command_parses(page: Path, number: int, command: str) -> None:
    """The documented command line is accepted by chainyard's own argument parser."""
    words = optional_parts_removed(shlex.split(command))[1:]
    assert words[:1] != ["summarise"], f"{page.name}:{number}: say `results-table`, not `summarise`"
    err = io.StringIO()
    try:
        with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
            cli._parser().parse_args(words)
    except SystemExit as exc:
        pytest.fail(
            f"{page.relative_to(ROOT)}:{number}: `{command}` is refused by the parser "
            f"(exit {exc.code}): {err.getvalue().strip()}"
        )


LINK = re.compile(r"\]\(([^)\s]+)\)")


def anchors(path: Path) -> set[str]:
    """The heading anchors of a Markdown file, made as GitHub makes them: lower case,
    punctuation other than ``-`` and ``_`` dropped, spaces as ``-`` (common practice, no
    source; repeated headings' ``-1`` suffixes are not made)."""
    found = set()
    for line in path.read_text().splitlines():
        match = re.match(r"#{1,6} (.+)", line)
        if match:
            found.add(re.sub(r"[^\w\- ]", "", match.group(1).strip().lower()).replace(" ", "-"))
    return found


@pytest.mark.parametrize("page", PAGES, ids=lambda p: p.name)
def test_relative_links_exist(page: Path) -> None:
    """Every relative link of the page names an existing file, and its ``#anchor`` (if any)
    a heading of that file (or of the page itself)."""
    broken = []
    for number, line in enumerate(page.read_text().splitlines(), 1):
        for target in LINK.findall(line):
            if re.match(r"[a-z][a-z0-9+.-]*:", target):
                continue  # http:, mailto:
            path, _, anchor = target.partition("#")
            file = page.parent / path if path else page
            if not file.exists():
                broken.append(f"{page.relative_to(ROOT)}:{number}: {target}")
            elif anchor and file.suffix == ".md" and anchor not in anchors(file):
                broken.append(f"{page.relative_to(ROOT)}:{number}: {target} (no such heading)")
    assert not broken, "broken links: " + "; ".join(broken)


def test_readme_is_short() -> None:
    """README.md stays a short entry page (detail lives in docs/)."""
    lines = len((ROOT / "README.md").read_text().splitlines())
    assert lines <= README_MAX_LINES, f"README.md has {lines} lines (at most {README_MAX_LINES})"
