"""The README's "One run from the command line" works as written.

The section's run config (the ``yaml`` block, saved under the path its first comment names)
and every command of its plain code blocks are taken from README.md and run, in order, in a
temporary folder laid out like a clone (the example workflow's model and data beside it),
with this environment's ``chainyard`` on PATH instead of ``. .venv/bin/activate``.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

import chainyard

pytestmark = pytest.mark.slow  # two replicas of 4,000 steps and six commands

ROOT = Path(__file__).resolve().parents[2]
SECTION = "## One run from the command line"


def walkthrough(readme: str) -> tuple[str, str, list[str]]:
    """The section's config path, config text and shell commands (continuations joined,
    trailing comments dropped), in README order."""
    body = readme.split(SECTION, 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```(\w*)\n(.*?)```", body, flags=re.S)
    yaml_text = next(text for lang, text in blocks if lang == "yaml")
    config_path = yaml_text.splitlines()[0].lstrip("# ").strip()
    commands: list[str] = []
    for lang, text in blocks:
        if lang:
            continue
        joined = text.replace("\\\n", " ")
        for line in joined.splitlines():
            command = re.split(r"\s+#\s", line, maxsplit=1)[0].strip()
            if command:
                commands.append(" ".join(command.split()))
    return config_path, yaml_text, commands


def test_walkthrough_extraction_finds_the_steps() -> None:
    """The extraction sees the config and the commands a user types (check, sample,
    decide, diagnose, derive), so the run test below cannot pass on an empty list."""
    path, text, commands = walkthrough((ROOT / "README.md").read_text())
    assert path == "runs/kiln.yaml" and "log_prob:" in text
    words = [c.split()[1] for c in commands if c.startswith("chainyard ")]
    assert words == ["check", "sample", "decide", "diagnose", "derive"]
    assert commands[0] == ". .venv/bin/activate"


def test_walkthrough_runs_as_written(tmp_path: Path) -> None:
    """Every command of the walkthrough exits 0 in a clone-like folder; the stores, the
    burn-in record and the derived store are where the README says."""
    path, text, commands = walkthrough((ROOT / "README.md").read_text())
    for sub in ("models", "data"):
        shutil.copytree(ROOT / "example_workflow" / sub, tmp_path / "example_workflow" / sub)
    (tmp_path / path).parent.mkdir(parents=True, exist_ok=True)
    (tmp_path / path).write_text(text)
    env = {**os.environ, "PATH": f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}"}
    for command in commands:
        if command == ". .venv/bin/activate":
            continue  # the test's own environment is on PATH
        res = subprocess.run(
            ["bash", "-c", command], cwd=tmp_path, capture_output=True, text=True, env=env
        )
        assert res.returncode == 0, f"{command}\n{res.stdout}\n{res.stderr}"
    kiln = tmp_path / "results" / "kiln"
    for r in (0, 1):
        assert chainyard.open_store(kiln / "draws" / f"replica-{r}.zarr").steps_done == 4000
    assert (kiln / "decisions" / "burn_in.json").is_file()
    derived = chainyard.open_store(kiln / "standalone" / "replica-0.zarr")
    assert derived.attrs["derived"]["burn_in_decided"] is True
