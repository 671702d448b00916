"""Helpers for tests that run real `snakemake` on real workflows in temporary folders."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path
from typing import Any

import yaml

from tests.patience import PATIENCE

SNAKEFILE = """\
import chainyard.workflow


configfile: "config/config.yaml"


module chainyard_rules:
    snakefile:
        chainyard.workflow.rules_path()
    config:
        config


use rule * from chainyard_rules as chainyard_*
"""

FAST_MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * np.sum(theta * theta, axis=1)
"""


def gauss_run(steps: int = 2000, replicas: int = 2, **extra: Any) -> dict[str, Any]:
    """A small, fast run config (vectorised 2-D Gaussian)."""
    run = {
        "model": {"log_prob": "models/gauss.py:log_prob", "vectorized": True},
        "parameters": [
            {"name": "x", "init": {"normal": {"loc": 0.0, "scale": 1.0}}, "unit": "m"},
            {"name": "y", "init": {"uniform": {"low": -1.0, "high": 1.0}}},
        ],
        "sampler": {"walkers": 16, "steps": steps},
        "storage": {"fsync": False},
        "seed": 7,
        "replicas": replicas,
    }
    run.update(extra)
    return run


def make_workflow(folder: Path, runs: dict[str, Any], models: dict[str, str] | None = None,
                  **settings: Any) -> Path:
    """Write a workflow (Snakefile, config, model files) using the chainyard rule module."""
    (folder / "workflow").mkdir(parents=True, exist_ok=True)
    (folder / "config").mkdir(exist_ok=True)
    (folder / "models").mkdir(exist_ok=True)
    (folder / "workflow" / "Snakefile").write_text(SNAKEFILE)
    for name, text in (models or {"gauss.py": FAST_MODEL}).items():
        (folder / "models" / name).write_text(textwrap.dedent(text))
    write_config(folder, runs, **settings)
    return folder


def write_config(folder: Path, runs: dict[str, Any], **settings: Any) -> None:
    """(Re)write config/config.yaml."""
    cfg = {"chainyard": {"runs": runs, **settings}}
    (folder / "config" / "config.yaml").write_text(yaml.safe_dump(cfg, sort_keys=False))


def snakemake(folder: Path, *args: str, timeout: float = PATIENCE,
              env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    """Run real snakemake in ``folder``."""
    return subprocess.run(
        [sys.executable, "-m", "snakemake", *args],
        cwd=folder, capture_output=True, text=True, timeout=timeout,
        env={**os.environ, **(env or {})},
    )


def popen_snakemake(folder: Path, *args: str) -> subprocess.Popen[str]:
    """Start real snakemake in the background."""
    return subprocess.Popen(
        [sys.executable, "-m", "snakemake", *args],
        cwd=folder, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
        start_new_session=True,
    )


def planned_jobs(folder: Path, *args: str) -> dict[str, int]:
    """Job counts per rule that a dry run would execute (empty when nothing to do)."""
    res = snakemake(folder, "-n", *args)
    assert res.returncode == 0, res.stdout + res.stderr
    text = res.stdout + res.stderr
    counts: dict[str, int] = {}
    if "Job stats:" not in text:
        return counts
    block = text.split("Job stats:", 1)[1].splitlines()[3:]
    for line in block:
        parts = line.split()
        if len(parts) != 2 or parts[0] == "total":
            break
        counts[parts[0]] = int(parts[1])
    return counts
