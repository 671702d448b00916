"""How long the tests wait: one place, generous enough for a heavily loaded machine.

A timeout in a test exists only to turn a hang into a failure, never to measure speed: a
run that is merely slow (a 2-core machine shared with a long CI job, a disk busy with
fsyncs) must still pass. Every wait for a real operation (a command to finish, a commit to
appear, a server to start, a killed process to be reaped) is therefore bounded by
``PATIENCE`` or by ``patient(seconds)``, never by a number that is only enough on an idle
machine.

Bounds that are part of what a test checks (a run stops within its grace period after
SIGTERM) are not patience: those tests keep their own bound and say so beside it.

``CHAINYARD_TEST_PATIENCE`` (seconds) overrides the default of 1800 s; with
``CHAINYARD_TEST_PATIENCE=60`` the scaled waits are the idle-machine values themselves.
"""

from __future__ import annotations

import os

__all__ = ["PATIENCE", "patient"]

#: the default bound, in seconds, on any wait for a real operation
DEFAULT_PATIENCE = 1800.0

#: the patience the scale of ``patient`` is measured against: a wait written as ``s``
#: seconds (enough on an idle machine) becomes ``s * PATIENCE / IDLE_PATIENCE``
IDLE_PATIENCE = 60.0


def _patience() -> float:
    raw = os.environ.get("CHAINYARD_TEST_PATIENCE", "").strip()
    if not raw:
        return DEFAULT_PATIENCE
    try:
        value = float(raw)
    except ValueError:
        raise ValueError(
            f"CHAINYARD_TEST_PATIENCE must be a number of seconds, got {raw!r}"
        ) from None
    if not value > 0 or value == float("inf"):
        raise ValueError(f"CHAINYARD_TEST_PATIENCE must be finite and > 0, got {raw!r}")
    return value


#: seconds any wait for a real operation may take before the test calls it a hang
PATIENCE: float = _patience()


def patient(seconds: float) -> float:
    """A wait of ``seconds`` (enough on an idle machine) scaled for a loaded one.

    Scaled by ``PATIENCE / 60`` (30 times with the default patience), never below
    ``seconds`` itself and never above ``PATIENCE``: for short waits (a killed process to
    be reaped, a helper to follow its parent out) that should stay shorter than a whole
    ``PATIENCE`` yet must not fail only because the machine is slow.
    """
    return float(max(seconds, min(PATIENCE, seconds * PATIENCE / IDLE_PATIENCE)))
