"""Which failed jobs a retry can mend, and a fast refusal of the retries that cannot.

Snakemake retries every failed job of a rule with ``retries: N``, whatever the cause. A
sampling job killed by the scheduler's time limit or the kernel's out-of-memory killer resumes
from its last commit on a retry; a config, model or input mistake fails the same way every
time. So a job that ends with one of :data:`FINAL_EXIT_CODES` leaves a small note next to its
resumable store (``.resumable/replica-R.failed.json``: exit status, message, the settings it
ran with). A retry of the same job in the same Snakemake invocation (attempt 2 and later)
that finds the note for the same settings fails at once with one line, without loading the
model or the store. Attempt 1 (every new invocation) always runs and removes a stale note, so
fixing the cause (an edited model, an installed package) needs no clean-up.
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path
from typing import Any

__all__ = ["FINAL_EXIT_CODES", "RetryNote"]

#: exit statuses a retry cannot mend (README exit table): 2 config, 3 model, 4 bad input or
#: store, 5 store made with other settings, 7 verification. Everything else (a signal, 1, 6
#: store locked by another process, 8 storage fault, 70 internal error) is retried.
FINAL_EXIT_CODES = frozenset({2, 3, 4, 5, 7})


class RetryNote:
    """The failure note of one sampling job.

    Parameters
    ----------
    path : Path
        Where the note lives (next to the resumable store).
    identity : str
        What the job ran with (the rule's settings param and replica): a note written for
        other settings never stops a job.
    attempt : int
        Snakemake's attempt number of this job (1 for the first run in an invocation).
    """

    def __init__(self, path: Path, identity: str, attempt: int) -> None:
        self.path = path
        self.key = hashlib.sha256(identity.encode()).hexdigest()
        self.attempt = attempt

    @classmethod
    def for_job(cls, sm: Any) -> RetryNote | None:
        """The note of a Snakemake sampling job (None for rules that are not retried)."""
        p = sm.params
        resumable = getattr(p, "resumable", None)
        attempt = sm.resources.get("attempt") if hasattr(sm.resources, "get") else None
        if resumable is None or attempt is None:
            return None
        from chainyard.workflow.config import sampling_settings_of

        identity = f"{sampling_settings_of(p)}\n{p.replica}"
        return cls(Path(str(resumable) + ".failed.json"), identity, int(attempt))

    def earlier_failure(self) -> dict[str, Any] | None:
        """The final failure of an earlier attempt with the same settings, if this is a retry.

        On attempt 1 a left-over note is removed and None returned.
        """
        try:
            note = json.loads(self.path.read_text())
        except (OSError, ValueError):
            return None
        if self.attempt <= 1 or not isinstance(note, dict) or note.get("key") != self.key:
            self.clear()
            return None
        return note

    def remember(self, exit_code: int, message: str) -> None:
        """Write the note when ``exit_code`` is final (a retry would fail the same way)."""
        if exit_code not in FINAL_EXIT_CODES:
            return
        note = {"key": self.key, "exit_code": exit_code, "attempt": self.attempt,
                "message": message.splitlines()[0] if message else ""}
        self.path.parent.mkdir(parents=True, exist_ok=True)
        tmp = self.path.with_name(self.path.name + ".tmp")
        tmp.write_text(json.dumps(note) + "\n")
        os.replace(tmp, self.path)

    def clear(self) -> None:
        """Remove the note (the job succeeded, or a new invocation tries again)."""
        self.path.unlink(missing_ok=True)
