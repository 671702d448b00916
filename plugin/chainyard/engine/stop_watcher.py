"""The stop watcher: a tiny helper process that arms the SIGTERM/SIGINT grace timer.

A Python signal handler runs only when the main thread returns to the interpreter, and a
timer thread needs the interpreter lock, which compiled code (a catastrophic regular
expression, a C extension's loop) may hold for ever. So the sampler hands the signals to
this process: ``signal.set_wakeup_fd`` makes the interpreter's C-level handler write the
signal number to a pipe the moment a signal arrives, whatever the main thread is doing; the
watcher reads it and, ``grace`` seconds later, writes ``F`` back (the repeat was forced) and
sends the signal again (compiled code that checks for signals, as ``re`` does, is then
interrupted). Should the sampler still be running ``hard`` seconds after that, the watcher
writes one line and kills it with SIGKILL (the store keeps its last commit, as after any
kill). It exits when the pipe closes (the sampler ended) or a 0 byte arrives (the sampler handled
a repeated signal, the user's or this watcher's, and stops by itself).

Run as a script (``python -I -S stop_watcher.py PID RFD WFD GRACE HARD SIGNALS``) so that it
imports nothing of chainyard and starts in a few milliseconds.
"""

from __future__ import annotations

import contextlib
import os
import select
import signal
import sys
import time


def watch(pid: int, rfd: int, wfd: int, grace: float, hard: float, signals: frozenset[int]) -> None:
    """Wait for a stop signal's byte on ``rfd``; resend after ``grace``, SIGKILL after ``hard``.

    Parameters
    ----------
    pid : int
        The sampler's process id.
    rfd, wfd : int
        The wakeup pipe's read end (signal numbers, one byte each) and the back channel's
        write end (``F`` before a forced repeat).
    grace, hard : float
        Seconds from the first stop signal to the repeat, and from the repeat to SIGKILL.
    signals : frozenset of int
        The signal numbers that start the grace timer (others, e.g. SIGALRM, are ignored).
    """
    signum = 0
    deadline = None  # monotonic time of the next action
    stage = 0  # 0: waiting for a stop signal; 1: grace running; 2: repeat sent
    while True:
        timeout = None if deadline is None else max(0.0, deadline - time.monotonic())
        ready, _, _ = select.select([rfd], [], [], timeout)
        if ready:
            data = os.read(rfd, 512)
            if not data:
                return  # the sampler closed the pipe (or ended)
            if 0 in data:
                return  # the sampler handled a repeated signal: it stops by itself
            if stage == 0:
                stops = [b for b in data if b in signals]
                if stops:
                    signum = stops[0]
                    stage, deadline = 1, time.monotonic() + grace
            continue
        if os.getppid() != pid:
            return
        if stage == 1:
            os.write(wfd, b"F")
            os.kill(pid, signum)
            stage, deadline = 2, time.monotonic() + hard
        else:
            name = signal.Signals(signum).name
            sys.stderr.write(
                f"chainyard: stopped by {name}: the model did not return to the interpreter "
                f"within {grace + hard:g} s; killed; the store keeps its last commit; rerun "
                "to continue\n"
            )
            sys.stderr.flush()
            os.kill(pid, signal.SIGKILL)
            return


def main(argv: list[str]) -> None:
    """Entry point: ``PID RFD WFD GRACE HARD SIGNALS`` (signals comma-separated)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C reaches the whole process group
    signal.signal(signal.SIGTERM, signal.SIG_IGN)  # the sampler decides; EOF ends us
    pid, rfd, wfd = int(argv[0]), int(argv[1]), int(argv[2])
    signals = frozenset(int(s) for s in argv[5].split(","))
    with contextlib.suppress(OSError, KeyboardInterrupt):
        watch(pid, rfd, wfd, float(argv[3]), float(argv[4]), signals)


if __name__ == "__main__":
    main(sys.argv[1:])
