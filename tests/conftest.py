"""Shared helpers: write run folders (config + model + data) and run the real command line."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml

import chainyard
from tests.patience import PATIENCE
from tests.reliability.conftest import TALLY, TALLY_FILE

GAUSS_MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * float(np.dot(theta, theta))
"""

#: model code for a held run (:func:`held_env`): ``hold()``, called once per model call, sleeps
#: ``HOLD_PAUSE_SECONDS`` after the first ``HOLD_AFTER_CALLS`` calls while the file
#: ``HOLD_FILE`` exists, so that a run cannot end before a test has seen what it waits for,
#: however loaded the machine; the model's values, and so the draws, never change
HOLD_CODE = """
import os as _os
import time as _time

_HOLD = _os.environ.get("HOLD_FILE", "")
_AFTER = int(_os.environ.get("HOLD_AFTER_CALLS", "0"))
_PAUSE = float(_os.environ.get("HOLD_PAUSE_SECONDS", "0"))
_CALLS = [0]


def hold():
    _CALLS[0] += 1
    if _HOLD and _CALLS[0] > _AFTER and _os.path.exists(_HOLD):
        _time.sleep(_PAUSE)
"""

#: about 1 ms per step for 16 walkers: a few-second run, so kills land mid-run (it can be
#: held: see HOLD_CODE)
SLOW_MODEL = HOLD_CODE + """
import time
import numpy as np

def log_prob(theta, data):
    t = time.perf_counter()
    while time.perf_counter() - t < 6e-5:
        pass
    hold()
    return -0.5 * float(np.dot(theta, theta))
"""


def held_env(hold: Path, after_calls: int, pause: float) -> dict[str, str]:
    """Environment for a run of a model with HOLD_CODE that, after ``after_calls`` calls and
    while the file ``hold`` exists, sleeps ``pause`` seconds per call (``hold`` is created
    here)."""
    hold.touch()
    return {
        "HOLD_FILE": str(hold),
        "HOLD_AFTER_CALLS": str(after_calls),
        "HOLD_PAUSE_SECONDS": str(pause),
    }


#: the minimal config from the core-engine issue, verbatim
MINIMAL_CONFIG = """\
model:
  log_prob: model.py:log_prob
parameters:
  - name: x
    init: {normal: {loc: 0.0, scale: 1.0}}
  - name: y
    init: {uniform: {low: -1.0, high: 1.0}}
sampler:
  walkers: 16
  steps: 2000
seed: 7
"""


def write_run(
    folder: Path,
    config: dict[str, Any] | str = MINIMAL_CONFIG,
    model: str = GAUSS_MODEL,
    files: dict[str, str] | None = None,
    name: str = "run.yaml",
) -> Path:
    """Write a config, its model file and extra files into ``folder``; return the config path."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "model.py").write_text(textwrap.dedent(model))
    for fname, text in (files or {}).items():
        (folder / fname).write_text(text)
    text = config if isinstance(config, str) else yaml.safe_dump(config, sort_keys=False)
    path = folder / name
    path.write_text(text)
    return path


def base_config(**changes: Any) -> dict[str, Any]:
    """The minimal config as a dict, with top-level sections updated by ``changes``."""
    cfg = yaml.safe_load(MINIMAL_CONFIG)
    for key, value in changes.items():
        if isinstance(value, dict) and isinstance(cfg.get(key), dict):
            cfg[key] = {**cfg[key], **value}
        else:
            cfg[key] = value
    return cfg


def cli(
    *args: str,
    cwd: Path | None = None,
    timeout: float = PATIENCE,
    env: dict[str, str] | None = None,
) -> subprocess.CompletedProcess[str]:
    """Run ``chainyard ARGS`` in a fresh Python process (``timeout`` only turns a hang into a
    failure: see tests/patience.py)."""
    return subprocess.run(
        [sys.executable, "-m", "chainyard.cli", *args],
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=timeout,
        env={**os.environ, **(env or {})},
    )


def popen_cli(
    *args: str, cwd: Path | None = None, env: dict[str, str] | None = None
) -> subprocess.Popen[str]:
    """Start ``chainyard ARGS`` in the background (stdout/stderr captured; ``env`` is added
    to this process's environment)."""
    return subprocess.Popen(
        [sys.executable, "-m", "chainyard.cli", *args],
        cwd=cwd,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env={**os.environ, **(env or {})},
    )


def assert_same_store(a: Path, b: Path) -> None:
    """Draws, log-prob, acceptance and blobs of two stores are bitwise identical."""
    sa, sb = chainyard.open_store(a), chainyard.open_store(b)
    assert sa.steps_done == sb.steps_done
    assert np.array_equal(sa.draws(), sb.draws())
    assert np.array_equal(sa.log_prob(), sb.log_prob())
    assert np.array_equal(sa.accepted(), sb.accepted())
    for name in sa.blob_names:
        assert np.array_equal(sa.blob(name), sb.blob(name), equal_nan=True)
    assert sa.commit_record["random_state"] == sb.commit_record["random_state"]
    assert sa.commit_record["checksums"] == sb.commit_record["checksums"]


def tree_snapshot(path: Path) -> dict[str, bytes]:
    """Every file under ``path`` with its bytes (to prove a store was left untouched)."""
    return {
        str(p.relative_to(path)): p.read_bytes() for p in sorted(path.rglob("*")) if p.is_file()
    }


@pytest.fixture
def run_dir(tmp_path: Path) -> Path:
    """A folder holding the minimal config and a standard-normal model."""
    write_run(tmp_path)
    return tmp_path


# -- the reliability tally across parallel workers (pytest-xdist) --------------------------


def pytest_sessionfinish(session: pytest.Session) -> None:
    """On a parallel worker: hand this worker's reliability counts to the controller."""
    workeroutput = getattr(session.config, "workeroutput", None)
    if workeroutput is not None:
        workeroutput["reliability_tally"] = TALLY.counts()


@pytest.hookimpl(optionalhook=True)
def pytest_testnodedown(node: Any, error: Any) -> None:
    """On the controller: add a finished worker's reliability counts."""
    counts = getattr(node, "workeroutput", {}).get("reliability_tally")
    if counts:
        TALLY.add(counts)


def pytest_terminal_summary(terminalreporter: pytest.TerminalReporter) -> None:
    """Print the reliability line (every worker's counts) and keep it for RESULTS.md."""
    if getattr(terminalreporter.config, "workeroutput", None) is not None:
        return  # a worker: the controller prints the sum
    t = TALLY
    if t.kills or t.faults or t.inputs or t.lost:
        terminalreporter.write_line(t.line())
        TALLY_FILE.write_text(json.dumps(t.counts()) + "\n")
