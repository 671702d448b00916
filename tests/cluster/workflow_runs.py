"""Copies of the example workflow for cluster tests, and what Snakemake's log says about jobs."""

from __future__ import annotations

import os
import re
import shutil
import signal
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

EXAMPLE = Path(__file__).parents[2] / "example_workflow"

#: the cooling model, paced by a sleep per call so that a sampling job lasts long enough
#: for a test to cancel it between two commits (sleeping costs no CPU on a shared machine)
PACED_MODEL = '''\
"""The example's cooling model with a pause per call (tests only)."""
import importlib.util
import time
from pathlib import Path

_spec = importlib.util.spec_from_file_location("cooling", Path(__file__).with_name("cooling.py"))
_cooling = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(_cooling)
PAUSE_SECONDS = {pause!r}
HOLD = Path(__file__).with_name("hold")  # while it exists, crawl after 300 steps
CALLS = [0]


def log_prob(theta, data):
    CALLS[0] += 1
    time.sleep(0.05 if CALLS[0] > 600 and HOLD.exists() else PAUSE_SECONDS)
    return _cooling.log_prob(theta, data)
'''


def reduced_example(folder: Path, *, steps: int, replicas: int, pause: float,
                    runtime_minutes: int) -> Path:
    """Copy the example workflow into ``folder`` with only the ``cooling`` run, reduced.

    ``steps`` and ``replicas`` shrink the run; its model is paced by ``pause`` seconds per
    call; commits come every 100 steps or second; the sampling rule's first-attempt wall
    time is ``runtime_minutes``. Everything else (Snakefile, data, profiles) is the example's.
    """
    shutil.copytree(EXAMPLE, folder, ignore=shutil.ignore_patterns(
        "results", ".snakemake", "report.html", "logs"))
    (folder / "models" / "cooling_paced.py").write_text(PACED_MODEL.format(pause=pause))
    path = folder / "config" / "config.yaml"
    cfg = yaml.safe_load(path.read_text())
    section = cfg["chainyard"]
    run = section["runs"]["cooling"]
    section["runs"] = {"cooling": run}
    section["sample_runtime_minutes"] = runtime_minutes
    run["model"]["log_prob"] = "models/cooling_paced.py:log_prob"
    run["sampler"]["steps"] = steps
    run["replicas"] = replicas
    run["storage"] = {**run.get("storage", {}), "commit_every_steps": 100,
                      "commit_every_seconds": 1.0, "fsync": False}
    path.write_text(yaml.safe_dump(cfg, sort_keys=False))
    return folder


def start_snakemake(folder: Path, *args: str, env: dict[str, str] | None = None,
                    log_name: str = "snakemake.out") -> tuple[subprocess.Popen[bytes], Path]:
    """Start real snakemake in ``folder`` in its own process group; output to a file."""
    log = folder / log_name
    with log.open("wb") as out:
        proc = subprocess.Popen([sys.executable, "-m", "snakemake", *args], cwd=folder,
                                stdout=out, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                env=env or dict(os.environ), start_new_session=True)
    return proc, log


def finish(proc: subprocess.Popen[bytes], timeout: float) -> int | None:
    """Wait for ``proc``; on timeout stop its whole process group and return None."""
    try:
        return proc.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        stop_group(proc)
        return None


def stop_group(proc: subprocess.Popen[bytes]) -> None:
    """SIGTERM, then SIGKILL, the process group of ``proc`` (it was started in its own)."""
    if proc.poll() is not None:
        return
    for sig, wait in ((signal.SIGTERM, 10.0), (signal.SIGKILL, 10.0)):
        try:
            os.killpg(proc.pid, sig)
        except ProcessLookupError:
            return
        try:
            proc.wait(timeout=wait)
            return
        except subprocess.TimeoutExpired:
            continue


@dataclass
class SubmittedJob:
    """One Snakemake job and what Snakemake asked of SLURM for it."""

    jobid: str
    rule: str
    wildcards: str
    threads: int
    resources: dict[str, str]
    slurm_ids: list[str]


_BLOCK = re.compile(r"^(?:local)?rule (\S+):\n((?:    .*\n)+)", re.MULTILINE)
_SUBMITTED = re.compile(r"^Job (\d+) has been submitted with SLURM jobid (\d+)", re.MULTILINE)


def submitted_jobs(log_text: str) -> dict[str, SubmittedJob]:
    """Jobs of a Snakemake run (by Snakemake job id) from its log: rule, resources, SLURM ids.

    A retried job appears once, with one SLURM id per attempt in submission order.
    """
    jobs: dict[str, SubmittedJob] = {}
    for rule, body in _BLOCK.findall(log_text):
        fields: dict[str, Any] = dict(
            line.strip().split(": ", 1) for line in body.splitlines() if ": " in line)
        if "jobid" not in fields:
            continue
        resources = dict(item.split("=", 1) for item in fields.get("resources", "").split(", ")
                         if "=" in item)
        jobs.setdefault(fields["jobid"], SubmittedJob(
            fields["jobid"], rule, fields.get("wildcards", ""), int(fields.get("threads", 1)),
            resources, []))
    for jobid, slurm_id in _SUBMITTED.findall(log_text):
        jobs[jobid].slurm_ids.append(slurm_id)
    return jobs


def wait_for(what: str, check: Any, timeout: float, interval: float = 0.2) -> Any:
    """Poll ``check()`` until it returns something truthy; fail after ``timeout`` seconds."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = check()
        if value:
            return value
        time.sleep(interval)
    raise AssertionError(f"timed out after {timeout:.0f} s waiting for {what}")


def zarr_stores(results: Path) -> list[Path]:
    """Published stores under ``results`` (not the resumable working copies), relative."""
    return sorted(p.relative_to(results) for p in results.rglob("*.zarr")
                  if p.is_dir() and ".resumable" not in p.parts)
