"""Named instants at which the reliability tests kill the process (test-only).

``CHAINYARD_TEST_KILL_AT=NAME`` (or ``NAME:N`` for the N-th time, counting from 1) makes
:func:`instant` send SIGKILL to the current process when it reaches that instant. Without the
variable, :func:`instant` is a dictionary lookup and returns. Instants in use (grep for
``instant(``): ``store-created``, ``chunks-written`` (rows flushed, commit record not yet
replaced), ``commit-replaced``, ``derive-before-publish``, ``pack-before-publish``.
"""

from __future__ import annotations

import os
import signal

__all__ = ["instant"]

_SPEC = os.environ.get("CHAINYARD_TEST_KILL_AT", "")
_NAME, _, _NTH = _SPEC.partition(":")
_COUNT = {"n": 0}


def instant(name: str) -> None:
    """Kill this process with SIGKILL if the tests asked for it at ``name``."""
    if not _NAME or name != _NAME:
        return
    _COUNT["n"] += 1
    if _COUNT["n"] >= (int(_NTH) if _NTH else 1):
        os.kill(os.getpid(), signal.SIGKILL)
