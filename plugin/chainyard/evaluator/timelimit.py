"""The per-call wall-time limit (``model.call_time_limit_seconds``) through SIGALRM."""

from __future__ import annotations

import signal
import time
from typing import Any

__all__: list[str] = []


class _CallTimedOut(BaseException):
    """Raised by the SIGALRM handler inside a user call that ran past its limit.

    A BaseException so that a model's ``except Exception`` does not swallow it.
    """


class _Alarm:
    """A per-call wall-time limit through ``setitimer(ITIMER_REAL)`` and SIGALRM.

    Armed for one batch of calls (``with``): the previous SIGALRM handler and any running
    real-time timer are restored afterwards (the timer with its remaining time). Only usable
    in the main thread (Python runs signal handlers there).
    """

    def __init__(self, seconds: float) -> None:
        self.seconds = seconds
        self.fired = False
        self._active = False

    def _handler(self, signum: int, frame: Any) -> None:
        if self._active:
            self.fired = True
            raise _CallTimedOut()

    def __enter__(self) -> _Alarm:
        self.fired = False
        self._old_handler = signal.signal(signal.SIGALRM, self._handler)
        self._old_timer = signal.setitimer(signal.ITIMER_REAL, 0)
        self._t0 = time.monotonic()
        return self

    def arm(self) -> None:
        self._active = True
        signal.setitimer(signal.ITIMER_REAL, self.seconds)

    def disarm(self) -> None:
        signal.setitimer(signal.ITIMER_REAL, 0)
        self._active = False

    def __exit__(self, *exc: object) -> None:
        self._active = False
        signal.setitimer(signal.ITIMER_REAL, 0)
        # None: the previous handler was not installed from Python (restore the default)
        old = self._old_handler if self._old_handler is not None else signal.SIG_DFL
        signal.signal(signal.SIGALRM, old)
        delay, interval = self._old_timer
        if delay > 0:
            left = delay - (time.monotonic() - self._t0)
            signal.setitimer(signal.ITIMER_REAL, max(left, 1e-6), interval)
