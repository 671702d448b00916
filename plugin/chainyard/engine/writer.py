"""The commit writer: encodes, writes and flushes committed rows on a background thread.

Compression (pcodec) and fsync would otherwise stop the sampler at every commit. One commit
is in flight at a time: the next one waits for it, so commit records are written in order,
each after its own rows. A crash at any instant still leaves the previous commit intact.
"""

from __future__ import annotations

import threading
from collections.abc import Callable

__all__ = ["CommitWriter"]


class CommitWriter:
    """Runs commit jobs one at a time on a background thread."""

    def __init__(self) -> None:
        self._thread: threading.Thread | None = None
        self._error: BaseException | None = None

    def _run(self, job: Callable[[], None]) -> None:
        try:
            job()
        except BaseException as exc:  # handed to the sampling thread by wait()
            self._error = exc

    def submit(self, job: Callable[[], None]) -> None:
        """Start ``job`` after the previous one has finished (re-raising its error)."""
        self.wait()
        self._thread = threading.Thread(
            target=self._run, args=(job,), name="chainyard-commit", daemon=True
        )
        self._thread.start()

    def wait(self, *, raise_error: bool = True) -> None:
        """Block until the job in flight is done; re-raise its error if ``raise_error``."""
        if self._thread is not None:
            self._thread.join()
            self._thread = None
        if self._error is not None and raise_error:
            error, self._error = self._error, None
            raise error
