"""Shared counters and helpers of the reliability suite.

Every reliability test reports what it did through the ``tally`` fixture; at the end of the
session one summary line is printed (kills survived, faults injected, inputs tried, data lost)
and the counts are written to ``tests/reliability/.last_tally.json`` (not committed) so that
``RESULTS.md`` can quote a real run. With parallel workers (pytest-xdist) each worker counts
its own tests and the controller adds them up (tests/conftest.py), so the line covers them all.
"""

from __future__ import annotations

import contextlib
import hashlib
import subprocess
from collections.abc import Iterator
from pathlib import Path

import pytest

TALLY_FILE = Path(__file__).with_name(".last_tally.json")


class Tally:
    """Counts of one test session (module-level, shared by every reliability test)."""

    def __init__(self) -> None:
        self.kills = 0
        self.faults = 0
        self.inputs = 0
        self.lost = 0

    def killed(self, n: int = 1) -> None:
        """``n`` processes were killed and the data survived (call after checking)."""
        self.kills += n

    def fault(self, n: int = 1) -> None:
        """``n`` faults (model, storage, corruption) were injected."""
        self.faults += n

    def input(self, n: int = 1) -> None:
        """``n`` bad or untrusted inputs were tried."""
        self.inputs += n

    def assert_intact(self, before: dict[str, str], path: Path, what: str = "") -> None:
        """Assert that the files hashed in ``before`` are byte-identical now; count a loss."""
        after = snapshot(path)
        changed = sorted(k for k in before if after.get(k) != before[k])
        if changed:
            self.lost += 1
        assert not changed, f"{what or path}: committed files changed or vanished: {changed[:5]}"

    def counts(self) -> dict[str, int]:
        """The four counts as a plain dict (what a parallel worker hands to the controller)."""
        return {"kills": self.kills, "faults": self.faults, "inputs": self.inputs,
                "lost": self.lost}

    def add(self, counts: dict[str, int]) -> None:
        """Add another process's ``counts`` (a parallel worker's) to these."""
        self.kills += int(counts.get("kills", 0))
        self.faults += int(counts.get("faults", 0))
        self.inputs += int(counts.get("inputs", 0))
        self.lost += int(counts.get("lost", 0))

    def line(self) -> str:
        return (
            f"reliability: kills survived {self.kills}, faults injected {self.faults}, "
            f"inputs tried {self.inputs}, data lost: {self.lost}"
        )


TALLY = Tally()


@contextlib.contextmanager
def mounted(mount_args: list[str], target: Path, refused: str) -> Iterator[Path]:
    """``mount MOUNT_ARGS TARGET`` for the duration of the block, unmounted afterwards
    (lazily, pass or fail); skips the test with ``refused: <reason>`` where mounting fails."""
    res = subprocess.run(["mount", *mount_args, str(target)], capture_output=True, text=True)
    if res.returncode != 0:
        pytest.skip(f"{refused}: {res.stderr.strip() or res.returncode}")
    try:
        yield target
    finally:
        subprocess.run(["umount", "-l", str(target)], capture_output=True, check=False)


def snapshot(path: Path) -> dict[str, str]:
    """SHA-256 of every file under ``path`` (or of ``path`` itself), keyed by relative path."""
    path = Path(path)
    if path.is_file():
        return {".": hashlib.sha256(path.read_bytes()).hexdigest()}
    out = {}
    for p in sorted(path.rglob("*")):
        if p.is_file() and not p.is_symlink():
            out[str(p.relative_to(path))] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


@pytest.fixture
def tally() -> Iterator[Tally]:
    """The session's reliability counters."""
    yield TALLY
