"""Named instants at which the reliability tests kill or stop the process (test-only).

``CHAINYARD_TEST_KILL_AT=NAME`` (or ``NAME:N`` for the N-th time, counting from 1) makes
:func:`instant` send SIGKILL to the current process when it reaches that instant;
``CHAINYARD_TEST_STOP_AT`` likewise sends SIGSTOP (the test continues it with SIGCONT), so a
test can act while the process is held at a known point. Without the variables,
:func:`instant` is a dictionary lookup and returns. Instants in use (grep for
``instant(``): ``store-created``, ``chunks-written`` (rows flushed, commit record not yet
replaced), ``commit-replaced``, ``derive-before-publish``, ``pack-before-publish``.
"""

from __future__ import annotations

import os
import signal

__all__ = ["instant"]


def _parse(spec: str) -> dict[str, int]:
    """``"a,b:3"`` -> ``{"a": 1, "b": 3}`` (instant name -> the visit that kills)."""
    out: dict[str, int] = {}
    for part in filter(None, (p.strip() for p in spec.split(","))):
        name, _, nth = part.partition(":")
        out[name] = int(nth) if nth else 1
    return out


_ACTIONS = {
    signal.SIGKILL: _parse(os.environ.get("CHAINYARD_TEST_KILL_AT", "")),
    signal.SIGSTOP: _parse(os.environ.get("CHAINYARD_TEST_STOP_AT", "")),
}
_WANTED = {name for at in _ACTIONS.values() for name in at}
_COUNT: dict[str, int] = {}


def instant(name: str) -> None:
    """Kill (SIGKILL) or stop (SIGSTOP) this process if the tests asked for it at ``name``."""
    if not _WANTED or name not in _WANTED:
        return
    _COUNT[name] = _COUNT.get(name, 0) + 1
    for sig, at in _ACTIONS.items():
        if name in at and _COUNT[name] == at[name]:
            os.kill(os.getpid(), sig)
