"""Stopping on SIGTERM/SIGINT: commit at the next step boundary, or stop anyway after a grace.

The first SIGTERM or SIGINT sets a flag; the run loop sees it at the next step boundary,
commits the finished steps and stops (exit 143/130). A model call that hangs never reaches
that boundary, so the first signal also starts a timer: if the process is still running
``STOP_GRACE_SECONDS`` later, the timer sends the same signal again, and the second signal
stops the run at once, without the unfinished steps (the last commit is intact and a rerun
recomputes them bit for bit). A signal sent by the user a second time does the same at once.
Should even that signal never be handled (a model stuck inside compiled code never returns
to the interpreter), the process ends ``HARD_STOP_SECONDS`` later (the store keeps its last
commit, as after a kill). SIGALRM is left alone: the guarded model evaluator uses it for
``model.call_time_limit_seconds``.

The timers run in a helper process (:mod:`chainyard.engine.stop_watcher`), told of each signal
through ``signal.set_wakeup_fd``: compiled code holding the interpreter lock (a catastrophic
regular expression) would keep a timer thread of this process from ever running. Where the
helper cannot start, timer threads do the same job for models that release the lock.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
from collections.abc import Iterator
from contextlib import contextmanager, suppress
from typing import Any

__all__ = ["HARD_STOP_SECONDS", "STOP_GRACE_SECONDS", "Interrupted", "StopFlag", "stop_on_signals"]

#: seconds a step may still run after the first SIGTERM/SIGINT before the run stops without it
STOP_GRACE_SECONDS = 10.0
#: further seconds before the process ends itself if the repeated signal is never handled
HARD_STOP_SECONDS = 5.0


class Interrupted(BaseException):
    """The run stopped on SIGTERM/SIGINT (after committing its finished steps, if it could).

    A BaseException (like KeyboardInterrupt) so that a model's ``except Exception`` cannot
    swallow it.

    Attributes
    ----------
    signum : int
        The signal number (the command line exits with ``128 + signum``).
    reported : bool
        True once a line saying where the run stopped has been written.
    """

    def __init__(self, signum: int, *, reported: bool = False) -> None:
        super().__init__(signal.Signals(signum).name)
        self.signum = signum
        self.reported = reported


class StopFlag:
    """Set by SIGTERM/SIGINT; the loop stops at the next step boundary and commits.

    A second signal while the flag is set (sent by the user, or by the grace timer) raises
    :class:`Interrupted` at once, wherever the main thread is.

    Parameters
    ----------
    grace : float
        Seconds after the first signal before the signal is sent again.
    hard : float
        Seconds after that before the process ends itself (``os._exit(128 + signum)``).
    """

    def __init__(self, grace: float = STOP_GRACE_SECONDS, hard: float = HARD_STOP_SECONDS):
        self.signum: int | None = None
        self.grace = grace
        self.hard = hard
        #: True once the grace period ran out (the run stops without its unfinished step)
        self.forced = False
        self._timers: list[threading.Timer] = []
        #: the stop watcher's back channel (``F`` before a forced repeat), if it runs
        self.watcher_fd: int | None = None
        #: the wakeup pipe's write end (a 0 byte stands the watcher down)
        self.watcher_wake: int | None = None

    def handler(self, signum: int, frame: Any) -> None:
        """The signal handler (runs on the main thread)."""
        if self.signum is not None:
            self.cancel()  # the interpreter is responsive: no need for the last resort
            if self.watcher_fd is not None and self.watcher_wake is not None:
                with suppress(BlockingIOError):
                    self.forced = os.read(self.watcher_fd, 16).startswith(b"F")
                with suppress(OSError):  # the interpreter is responsive: no SIGKILL needed
                    os.write(self.watcher_wake, b"\0")
            raise Interrupted(signum)
        self.signum = signum
        if self.watcher_fd is None:  # no watcher process: timer threads instead
            self._start(self.grace, self._resend)

    def _start(self, seconds: float, action: Any) -> None:
        timer = threading.Timer(seconds, action)
        timer.daemon = True
        timer.name = "chainyard-stop"
        self._timers.append(timer)
        timer.start()

    def _resend(self) -> None:
        assert self.signum is not None
        self.forced = True
        self._start(self.hard, self._hard_exit)
        os.kill(os.getpid(), self.signum)

    def _hard_exit(self) -> None:  # pragma: no cover - needs a model stuck in C code
        assert self.signum is not None
        name = signal.Signals(self.signum).name
        sys.stderr.write(
            f"chainyard: stopped by {name}: the model did not return to the interpreter "
            f"within {self.grace + self.hard:g} s; the store keeps its last commit; rerun "
            "to continue\n"
        )
        sys.stderr.flush()
        os._exit(128 + self.signum)

    def cancel(self) -> None:
        """Stop the timers (the run has ended)."""
        for timer in self._timers:
            timer.cancel()
        self._timers = []


class _Watcher:
    """The stop watcher process and its two pipes (see :mod:`chainyard.engine.stop_watcher`)."""

    def __init__(self, flag: StopFlag) -> None:
        wake_r, self.wake_w = os.pipe()
        self.back_r, back_w = os.pipe()
        os.set_blocking(self.wake_w, False)
        os.set_blocking(self.back_r, False)
        script = os.path.join(os.path.dirname(__file__), "stop_watcher.py")
        stops = f"{int(signal.SIGTERM)},{int(signal.SIGINT)}"
        args = [str(os.getpid()), str(wake_r), str(back_w), f"{flag.grace!r}", f"{flag.hard!r}"]
        try:
            self.proc: subprocess.Popen[bytes] | None = subprocess.Popen(
                [sys.executable, "-I", "-S", script, *args, stops],
                pass_fds=(wake_r, back_w),
                stdin=subprocess.DEVNULL,
                stdout=subprocess.DEVNULL,
            )
        except OSError:
            self.proc = None
        finally:
            os.close(wake_r)
            os.close(back_w)

    def close(self) -> None:
        """Close the pipes (the watcher sees end-of-file and exits) and reap it."""
        os.close(self.wake_w)
        if self.proc is not None:
            try:
                self.proc.wait(timeout=30)
            except subprocess.TimeoutExpired:  # pragma: no cover - a watcher that hangs
                self.proc.kill()
                self.proc.wait()
        os.close(self.back_r)


@contextmanager
def stop_on_signals(grace: float = STOP_GRACE_SECONDS) -> Iterator[StopFlag]:
    """Handle SIGTERM and SIGINT with a :class:`StopFlag` inside the block (main thread only)."""
    flag = StopFlag(grace)
    try:
        old = {s: signal.signal(s, flag.handler) for s in (signal.SIGTERM, signal.SIGINT)}
    except ValueError:  # not the main thread: leave signals alone
        yield flag
        return
    watcher = _Watcher(flag)
    old_fd = -1
    if watcher.proc is not None:
        old_fd = signal.set_wakeup_fd(watcher.wake_w, warn_on_full_buffer=False)
        flag.watcher_fd = watcher.back_r
        flag.watcher_wake = watcher.wake_w
    try:
        yield flag
    finally:
        flag.cancel()
        flag.watcher_fd = flag.watcher_wake = None
        if watcher.proc is not None:
            signal.set_wakeup_fd(old_fd)
        for s, h in old.items():
            signal.signal(s, h)
        watcher.close()
