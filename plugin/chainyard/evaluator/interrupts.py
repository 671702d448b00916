"""Which exceptions from user code pass through the evaluator untouched.

chainyard's own stop signal (:class:`chainyard.engine.run.Interrupted`), and a real Ctrl-C,
told from a model's own ``raise KeyboardInterrupt`` by the SIGINT recorder
:func:`watch_sigint` installs in place of Python's default handler.
"""

from __future__ import annotations

import signal
import sys
import threading
from typing import Any

__all__ = ["watch_sigint"]


def _is_stop_signal(exc: BaseException) -> bool:
    """True for chainyard's own stop signal (``engine.run.Interrupted``), which must pass."""
    run = sys.modules.get("chainyard.engine.run")
    return run is not None and isinstance(exc, run.Interrupted)


#: the KeyboardInterrupt the SIGINT recorder raised last (a real Ctrl-C)
_last_sigint: list[BaseException | None] = [None]


def _record_sigint(signum: int, frame: Any) -> None:
    """SIGINT handler that acts like Python's default one (raises KeyboardInterrupt) and
    remembers the exception, so that a real Ctrl-C can be told from a KeyboardInterrupt that
    user code raised itself."""
    exc = KeyboardInterrupt()
    _last_sigint[0] = exc
    raise exc


def watch_sigint() -> None:
    """Replace Python's default SIGINT handler by the equivalent recorder (main thread only).

    Ctrl-C behaves exactly as before (KeyboardInterrupt); chainyard can now tell it from a
    ``raise KeyboardInterrupt`` in user code. Any other handler in force is left alone.
    """
    if threading.current_thread() is not threading.main_thread():
        return
    if signal.getsignal(signal.SIGINT) is signal.default_int_handler:
        signal.signal(signal.SIGINT, _record_sigint)


def _is_real_ctrl_c(exc: BaseException) -> bool:
    """Whether a KeyboardInterrupt from user code comes from a real SIGINT (let it pass).

    With the recorder installed, only the exception it raised is real. With Python's default
    handler (recorder not installed, e.g. outside the main thread) it cannot be told, and is
    taken as real. With any other handler (the run loop's, which sets a flag and never raises
    KeyboardInterrupt), the model raised it.
    """
    if not isinstance(exc, KeyboardInterrupt):
        return False
    handler = signal.getsignal(signal.SIGINT)
    if handler is _record_sigint:
        return exc is _last_sigint[0]
    return handler is signal.default_int_handler
