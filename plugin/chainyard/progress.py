"""Progress reporting: a bar on a terminal, plain periodic log lines otherwise."""

from __future__ import annotations

import sys
import time
from typing import TextIO

__all__ = ["Progress", "format_eta"]


def format_eta(seconds: float) -> str:
    """Seconds as H:MM:SS ("?" when unknown)."""
    if seconds != seconds or seconds == float("inf") or seconds < 0:
        return "?"
    s = round(seconds)
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}"


class Progress:
    """Reports sampling progress.

    Parameters
    ----------
    total : int
        Step count the run is heading for.
    done : int
        Steps already committed when this process started.
    mode : {"auto", "bar", "log", "off"}
        ``auto``: a tqdm bar when ``stream`` is a terminal, log lines otherwise.
    interval : float
        Seconds between log lines (log mode).
    stream : file
        Where to write (default: standard error).
    label : str
        Prefix naming the run.
    """

    def __init__(
        self,
        total: int,
        done: int,
        *,
        mode: str = "auto",
        interval: float = 10.0,
        stream: TextIO | None = None,
        label: str = "chainyard",
    ) -> None:
        self.stream = stream or sys.stderr
        if mode == "auto":
            mode = "bar" if getattr(self.stream, "isatty", lambda: False)() else "log"
        self.mode = mode
        self.total, self.start_done, self.done = total, done, done
        self.interval = interval
        self.label = label
        self._t0 = time.monotonic()
        self._last = self._t0
        self._bar = None
        if mode == "bar":
            from tqdm import tqdm

            self._bar = tqdm(
                total=total,
                initial=done,
                file=self.stream,
                unit="step",
                desc=label,
                mininterval=0.5,
                dynamic_ncols=True,
            )

    def update(self, done: int, acceptance: float) -> None:
        """Record that ``done`` steps are now finished; ``acceptance`` over this session."""
        if self._bar is not None:
            self._bar.update(done - self.done)
            self._bar.set_postfix_str(f"acc {acceptance:.2f}", refresh=False)
        self.done = done
        if self.mode == "log":
            now = time.monotonic()
            if now - self._last >= self.interval:
                self._last = now
                self.line(acceptance)

    def line(self, acceptance: float) -> None:
        """Write one plain progress line."""
        elapsed = time.monotonic() - self._t0
        rate = (self.done - self.start_done) / elapsed if elapsed > 0 else float("nan")
        eta = (self.total - self.done) / rate if rate and rate > 0 else float("nan")
        pct = 100.0 * self.done / self.total if self.total else 100.0
        self.stream.write(
            f"{self.label}: step {self.done:,}/{self.total:,} ({pct:.1f}%) | "
            f"{rate:,.0f} steps/s | acceptance {acceptance:.3f} | ETA {format_eta(eta)}\n"
        )
        self.stream.flush()

    def message(self, text: str) -> None:
        """Write a status line (shown in every mode, without disturbing the bar)."""
        if self._bar is not None:
            self._bar.write(f"{self.label}: {text}", file=self.stream)
        else:
            self.stream.write(f"{self.label}: {text}\n")
            self.stream.flush()

    def close(self, acceptance: float) -> None:
        """Finish: close the bar, or write a final log line."""
        if self._bar is not None:
            self._bar.close()
        elif self.mode == "log" and self.done > self.start_done:
            self.line(acceptance)
