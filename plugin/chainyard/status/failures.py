"""Why a sampling job failed, from what it left in the results folder (small, bounded reads)."""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

__all__ = ["failure_reason", "mtime"]

#: small JSON files (failure notes) bigger than this are not ours and are not read
_MAX_NOTE_BYTES = 64 * 1024
#: bytes read from the end of a log when looking for its error line
_LOG_TAIL_BYTES = 64 * 1024


def mtime(path: Path) -> float | None:
    """Modification time of ``path`` (seconds since the epoch), None if it cannot be read."""
    try:
        return path.stat().st_mtime
    except OSError:
        return None


def _read_small_json(path: Path) -> dict[str, Any] | None:
    """A small JSON object from ``path``; None if missing, too big, unreadable or not a dict."""
    try:
        with path.open("rb") as f:
            raw = f.read(_MAX_NOTE_BYTES + 1)
        data = json.loads(raw) if len(raw) <= _MAX_NOTE_BYTES else None
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


def failure_reason(results: Path, run: str, replica: int) -> tuple[str, float] | None:
    """A failed sampling job's one line and when it was written, or None.

    Read from ``logs/RUN/sample-replica-R.failure.json`` (``reason``, ``exit_code``), else
    the retry note beside the resumable store (``message``), else the last
    ``chainyard: error:`` line of the job's log.
    """
    logs = results / "logs" / run
    note = logs / f"sample-replica-{replica}.failure.json"
    data = _read_small_json(note)
    if data is not None and isinstance(data.get("reason"), str):
        code = data.get("exit_code")
        suffix = f" (exit {code})" if isinstance(code, int) else ""
        return _one_line(data["reason"]) + suffix, mtime(note) or 0.0
    retry = results / run / ".resumable" / f"replica-{replica}.zarr.failed.json"
    data = _read_small_json(retry)
    if data is not None and isinstance(data.get("message"), str):
        code = data.get("exit_code")
        suffix = f" (exit {code})" if isinstance(code, int) else ""
        return _one_line(data["message"]) + suffix, mtime(retry) or 0.0
    log = logs / f"sample-replica-{replica}.log"
    line = _last_error_line(log)
    if line is not None:
        return line, mtime(log) or 0.0
    return None


def _one_line(text: str) -> str:
    first = (text.strip().splitlines() or [""])[0]
    return first[:500]


def _last_error_line(log: Path) -> str | None:
    """The last ``chainyard: error:`` (or internal error) line of a log; None if none."""
    try:
        with log.open("rb") as f:
            f.seek(0, os.SEEK_END)
            size = f.tell()
            f.seek(max(0, size - _LOG_TAIL_BYTES))
            tail = f.read().decode("utf-8", "replace")
    except OSError:
        return None
    for line in reversed(tail.splitlines()):
        if line.startswith("chainyard: error: "):
            return _one_line(line[len("chainyard: error: ") :])
        if line.startswith("chainyard: internal error: "):
            return _one_line(line[len("chainyard: ") :])
    return None
