"""Every subpackage of chainyard ships in the wheel (a plain, non-editable install).

An editable install finds any folder under ``plugin/``; a wheel holds only the packages named
in ``pyproject.toml``. A subpackage missing from that list passes every test run against the
editable install and breaks the first command of a user who installed the wheel.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def test_every_subpackage_is_listed_in_pyproject() -> None:
    listed = set(
        tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"]
    )
    found = {
        ".".join(init.parent.relative_to(ROOT / "plugin").parts)
        for init in (ROOT / "plugin" / "chainyard").rglob("__init__.py")
    }
    missing = sorted(found - listed)
    assert not missing, f"add to [tool.setuptools] packages in pyproject.toml: {missing}"
