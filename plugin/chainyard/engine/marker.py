"""The "run in progress" marker: how the next run learns that the previous one died.

A segfault in a compiled model, ``os._exit`` or a kill cannot be caught, so ``sample`` leaves a
small JSON file beside the store while it works and removes it on every normal or handled
exit. A marker found by the next ``sample`` (which holds the store lock, so the writer that
left it is gone) means that run ended abnormally; one line says so and where the store
stands. The marker sits beside the store, like the lock file, never inside it, so ``verify``
and ``pack`` never see it::

    .<store name>.running        # beside the store's real location
    {"pid": 1234, "host": "node7", "started_utc": "2026-12-02T07:30:00Z",
     "steps_committed": 500}

``steps_committed`` is the store's count when the run began; the count when it died is read
from the store itself (the commit record is the truth, and it costs nothing per commit).
"""

from __future__ import annotations

import contextlib
import json
import os
import socket
from pathlib import Path
from typing import Any

from chainyard.facts import utc_now

__all__ = ["marker_path", "previous_run_line", "read_marker", "remove_marker", "write_marker"]

#: the marker is small; anything bigger is not ours and is not read
_MAX_BYTES = 4096


def marker_path(store_path: str | Path) -> Path:
    """The marker file of ``store_path``: ``.<name>.running`` beside its real location."""
    real = Path(os.path.realpath(Path(store_path)))
    return real.parent / f".{real.name}.running"


def write_marker(store_path: str | Path, steps_committed: int) -> Path:
    """Record that this process is working on the store (replacing any old marker)."""
    path = marker_path(store_path)
    record = {
        "pid": os.getpid(),
        "host": socket.gethostname(),
        "started_utc": utc_now(),
        "steps_committed": int(steps_committed),
    }
    tmp = path.with_name(f"{path.name}.{os.getpid()}.partial")
    try:
        tmp.write_text(json.dumps(record) + "\n")
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
    return path


def read_marker(store_path: str | Path) -> dict[str, Any] | None:
    """The marker left beside the store, or None (also for an unreadable or foreign file)."""
    path = marker_path(store_path)
    try:
        with path.open("rb") as f:
            raw = f.read(_MAX_BYTES + 1)
        data = json.loads(raw) if len(raw) <= _MAX_BYTES else None
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


def remove_marker(store_path: str | Path) -> None:
    """Remove the marker (nothing happens if it is missing or cannot be removed)."""
    with contextlib.suppress(OSError):
        marker_path(store_path).unlink()


def previous_run_line(
    marker: dict[str, Any], steps_now: int | None, *, complete: bool = False
) -> str:
    """The one line about a run that left its marker behind.

    Parameters
    ----------
    marker : dict
        What :func:`read_marker` returned.
    steps_now : int or None
        The store's committed steps now (None: there is no store yet).
    complete : bool
        The store already holds every requested step.
    """
    who = f"pid {marker.get('pid', '?')} on {marker.get('host', '?')}"
    when = marker.get("started_utc", "?")
    if steps_now is None:
        where = "before creating the store; starting over"
    elif complete:
        where = f"after committing step {steps_now:,}"
    else:
        where = f"after committing step {steps_now:,}; resuming from there"
    return f"previous run ({who}, started {when}) ended abnormally {where}"
