"""A failed workflow job's one-line cause: on the terminal and in a small JSON file.

A job writes its output and errors to its log (``RESULTS/logs/RUN/STEP.log``). When it fails,
the cause must not stay buried there: the job prints one line to the terminal's stderr
(Snakemake shows it beside its own error report) and writes
``RESULTS/logs/RUN/STEP.failure.json`` beside the log, e.g.
``results/logs/kiln/sample-replica-0.failure.json``::

    {"run": "kiln", "replica": 0, "step": "sample", "exit_code": 3,
     "reason": "model raised ValueError: ... (walker 4, theta = [...])",
     "log": "results/logs/kiln/sample-replica-0.log", "attempt": 1, "written_utc": "..."}

``replica`` is null for jobs of a whole run (``analyse``) and ``run`` is null for the
overview. A job that succeeds removes the file, so its presence is the run's state: failed,
and why.
"""

from __future__ import annotations

import contextlib
import json
import os
from pathlib import Path
from typing import Any

__all__ = ["FAILURE_SUFFIX", "cause_from_log", "clear_failure", "failure_path", "write_failure"]

FAILURE_SUFFIX = ".failure.json"

#: the prefixes of chainyard's one-line messages (see chainyard.cli)
_PREFIXES = ("chainyard: error: ", "chainyard: internal error: ")


def failure_path(log: str | Path) -> Path:
    """The failure file beside a job's log: ``X.log`` -> ``X.failure.json``."""
    log = Path(log)
    stem = log.name[: -len(".log")] if log.name.endswith(".log") else log.name
    return log.with_name(stem + FAILURE_SUFFIX)


def cause_from_log(log: str | Path) -> str | None:
    """The first chainyard error line of the log's last error block, without its prefix.

    Used for failures whose line was printed by a shared helper (storage faults, internal
    errors). None if the log holds no such line or cannot be read.
    """
    try:
        lines = Path(log).read_text(errors="replace").splitlines()
    except OSError:
        return None
    found = None
    for i, line in enumerate(lines):
        if line.startswith(_PREFIXES) and (i == 0 or not lines[i - 1].startswith(_PREFIXES)):
            found = line
    if found is None:
        return None
    for prefix in _PREFIXES:
        if found.startswith(prefix):
            kept = "internal error: " if prefix.startswith("chainyard: internal") else ""
            return kept + found[len(prefix) :]
    return found  # pragma: no cover - every found line has a prefix


def write_failure(log: str | Path, job: dict[str, Any], exit_code: int, reason: str) -> Path:
    """Write the failure file of a job (atomically) and return its path.

    Parameters
    ----------
    log : str or Path
        The job's log file.
    job : dict
        ``run`` (str or None), ``replica`` (int or None), ``step`` (str), ``attempt``.
    exit_code : int
        The job's exit status (README exit table; 128 + N for signal N).
    reason : str
        The one-line cause.
    """
    from chainyard.provenance import utc_now

    path = failure_path(log)
    body = {
        "run": job.get("run"),
        "replica": job.get("replica"),
        "step": job.get("step"),
        "exit_code": int(exit_code),
        "reason": reason.splitlines()[0] if reason else "",
        "log": str(log),
        "attempt": job.get("attempt"),
        "written_utc": utc_now(),
    }
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(json.dumps(body, sort_keys=True) + "\n")
    os.replace(tmp, path)
    return path


def clear_failure(log: str | Path) -> None:
    """Remove the failure file of a job (it succeeded)."""
    with contextlib.suppress(OSError):
        failure_path(log).unlink(missing_ok=True)
