"""Fault injection for the reliability suite: real processes, real kills, real file systems.

What is here:

* :func:`run` and :func:`start`: the real command line in a child process (optionally under a
  file-size limit, :func:`fsize_limit`), started in its own session so that a kill of the
  whole group (as a batch scheduler does) is possible and the commit helper can be waited for;
* :func:`kill` (SIGKILL the process or its group, then wait until every process of the group
  is gone: the commit helper must die with its parent);
* :func:`tmpfs`, :func:`read_only`, :func:`fill`: a small size-limited tmpfs (needs root),
  read-only remounts and a filler file that leaves a chosen number of bytes free;
* :class:`KillPlan` and :func:`fuzz_seed`: the seeded random kill schedule;
* the checks every case shares: :func:`assert_one_error`, :func:`committed_files`,
  :func:`leftovers`, :func:`instant_wired`.
"""

from __future__ import annotations

import json
import os
import resource
import secrets
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager, suppress
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

import chainyard
from tests.patience import PATIENCE, patient

__all__ = [
    "KillPlan",
    "assert_one_error",
    "committed_files",
    "committed_steps",
    "fill",
    "fsize_limit",
    "fuzz_seed",
    "instant_wired",
    "kill",
    "leftovers",
    "read_only",
    "run",
    "scratch",
    "start",
    "tmpfs",
    "wait_for",
]

PACKAGE = Path(chainyard.__file__).parent
CLI = [sys.executable, "-m", "chainyard.cli"]


# ------------------------------------------------------------------ processes
def run(
    *args: str,
    cwd: Path | None = None,
    env: dict[str, str] | None = None,
    preexec_fn: Callable[[], None] | None = None,
    timeout: float = PATIENCE,
) -> subprocess.CompletedProcess[str]:
    """Run ``chainyard ARGS`` to the end in a fresh process; stdout/stderr captured."""
    return subprocess.run(
        [*CLI, *args],
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=timeout,
        env={**os.environ, **(env or {})},
        preexec_fn=preexec_fn,
    )


def start(
    *args: str, cwd: Path | None = None, env: dict[str, str] | None = None
) -> subprocess.Popen[str]:
    """Start ``chainyard ARGS`` in its own session (process group = its pid)."""
    return subprocess.Popen(
        [*CLI, *args],
        cwd=cwd,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
        env={**os.environ, **(env or {})},
        start_new_session=True,
    )


def _group_alive(pgid: int) -> bool:
    try:
        os.killpg(pgid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def kill(
    proc: subprocess.Popen[str], *, group: bool = False, timeout: float = patient(20)
) -> bool:
    """SIGKILL ``proc`` (or its whole process group) unless it has ended.

    Waits until no process of its group is left (a commit helper must not outlive its
    parent). Returns True if the kill happened, False if the process had already exited.
    """
    killed = False
    if proc.poll() is None:
        try:
            if group:
                os.killpg(proc.pid, signal.SIGKILL)
            else:
                proc.send_signal(signal.SIGKILL)
            killed = True
        except ProcessLookupError:
            pass
    proc.wait(timeout=timeout)
    if proc.stderr is not None:
        proc.stderr.close()
    killed = killed and proc.returncode == -signal.SIGKILL
    deadline = time.monotonic() + timeout
    while _group_alive(proc.pid):
        if time.monotonic() > deadline:
            with suppress(ProcessLookupError):
                os.killpg(proc.pid, signal.SIGKILL)
            raise AssertionError(f"a child of pid {proc.pid} outlived it by {timeout} s")
        time.sleep(0.002)
    return killed


def wait_for(
    predicate: Callable[[], bool], proc: subprocess.Popen[str], timeout: float = PATIENCE
) -> bool:
    """Poll ``predicate`` every ~2 ms until it holds (True) or ``proc`` ends (False)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return True
        if proc.poll() is not None:
            return False
        time.sleep(0.002)
    raise AssertionError(f"timed out after {timeout} s waiting for the run to progress")


def committed_steps(store: Path) -> int:
    """``steps_done`` of the commit record as it is on disk (-1 without a readable record)."""
    try:
        return int(json.loads((store / "commit.json").read_text())["steps_done"])
    except (OSError, ValueError, KeyError, TypeError):
        return -1


def fsize_limit(nbytes: int) -> Callable[[], None]:
    """A ``preexec_fn`` that sets RLIMIT_FSIZE (``ulimit -f``) to ``nbytes`` in the child."""

    def limit() -> None:
        resource.setrlimit(resource.RLIMIT_FSIZE, (nbytes, nbytes))

    return limit


# ------------------------------------------------------------------ file systems
def _mount(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(["mount", *args], capture_output=True, text=True)


@contextmanager
def tmpfs(path: Path, size_kib: int) -> Iterator[Path]:
    """Mount a tmpfs of ``size_kib`` KiB at ``path`` for the block; skip if not permitted."""
    path.mkdir(parents=True, exist_ok=True)
    res = _mount("-t", "tmpfs", "-o", f"size={size_kib}k,mode=0755", "tmpfs", str(path))
    if res.returncode != 0:
        pytest.skip(
            f"cannot mount a tmpfs here (needs root or CAP_SYS_ADMIN): {res.stderr.strip()}"
        )
    try:
        yield path
    finally:
        for _ in range(50):
            done = subprocess.run(["umount", str(path)], capture_output=True)
            if done.returncode == 0:
                break
            time.sleep(0.1)
        else:
            subprocess.run(["umount", "-l", str(path)], capture_output=True)


def remount(path: Path, options: str) -> None:
    """``mount -o remount,OPTIONS PATH`` (asserting it worked)."""
    res = _mount("-o", f"remount,{options}", str(path))
    assert res.returncode == 0, f"remount {options} of {path}: {res.stderr}"


@contextmanager
def read_only(path: Path) -> Iterator[Path]:
    """Remount the tmpfs at ``path`` read-only for the block (read-write again after)."""
    remount(path, "ro")
    try:
        yield path
    finally:
        remount(path, "rw")


def free_bytes(path: Path) -> int:
    """Bytes free for writing on the file system holding ``path``."""
    st = os.statvfs(path)
    return st.f_bavail * st.f_frsize


def fill(path: Path, leave: int) -> Path:
    """Write a filler file into the file system at ``path`` so that ~``leave`` bytes stay free.

    Returns the filler's path (delete it to remove the fault).
    """
    filler = path / "filler.bin"
    need = free_bytes(path) - leave
    assert need > 0, f"only {free_bytes(path)} bytes free at {path}, wanted {leave} free"
    with open(filler, "wb") as f:
        f.write(b"\0" * need)
    return filler


# ------------------------------------------------------------------ checks
ERROR_PREFIX = "chainyard: error:"


def assert_one_error(res: subprocess.CompletedProcess[str], code: int, *mentions: str) -> str:
    """Exit status ``code``, exactly one error line naming each of ``mentions``, no traceback.

    Returns the error line.
    """
    where = f"exit {res.returncode}; stderr:\n{res.stderr[-3000:]}"
    assert "Traceback" not in res.stderr, where
    lines = [ln for ln in res.stderr.splitlines() if ln.startswith(ERROR_PREFIX)]
    assert len(lines) == 1, where
    assert res.returncode == code, where
    for m in mentions:
        assert m in lines[0], f"{m!r} not in {lines[0]!r}"
    return lines[0]


def leftovers(root: Path) -> list[str]:
    """Temporary files or folders (``*.partial``, ``*.tmp``) under ``root``."""
    return sorted(
        str(p.relative_to(root))
        for p in root.rglob("*")
        if p.name.endswith((".partial", ".tmp")) or ".partial" in p.name
    )


def committed_files(store: Path) -> dict[str, str]:
    """SHA-256 of the files holding committed data that no later write may change.

    The start-state chunks, and the chunk files of every per-step array whose chunk is
    complete in the commit on disk (a partial last chunk is legitimately rewritten when the
    run continues).
    """
    from tests.reliability.conftest import snapshot

    s = chainyard.open_store(store)
    full = s.steps_done // s.chunk_steps
    keys = {s.start_chunk_key(n) for n in s.start_names()}
    for name in s.array_names():
        keys.update(s.chunk_key(name, i) for i in range(full))
    every = snapshot(store)
    return {k: v for k, v in every.items() if k in keys}


def rows(store: Path) -> dict[str, np.ndarray]:
    """The committed arrays of a store, and its start state (for bitwise comparison)."""
    s = chainyard.open_store(store)
    out = {"draws": s.draws(), "log_prob": s.log_prob(), "accepted": s.accepted()}
    out.update({f"start/{k}": v for k, v in s.start_state().items()})
    return out


def assert_prefix_of(store: Path, reference: Path) -> int:
    """The committed rows of ``store`` equal the reference's first rows bitwise; returns
    their number."""
    got, ref = rows(store), rows(reference)
    n = got["draws"].shape[0]
    for k, v in got.items():
        want = ref[k] if k.startswith("start/") else ref[k][:n]
        assert np.array_equal(v, want), f"{store}: {k} differs from the reference"
    return n


def instant_wired(name: str) -> bool:
    """True if ``testhooks.instant(NAME)`` is called somewhere in the package."""
    needles = (f'instant("{name}")', f"instant('{name}')")
    for src in PACKAGE.rglob("*.py"):
        if src.name == "testhooks.py":
            continue
        text = src.read_text()
        if any(n in text for n in needles):
            return True
    return False


# ------------------------------------------------------------------ kill schedule
def fuzz_seed() -> int:
    """The schedule's seed: ``CHAINYARD_FUZZ_SEED`` if set, else a fresh random one."""
    env = os.environ.get("CHAINYARD_FUZZ_SEED")
    return int(env) if env else secrets.randbits(32)


@dataclass(frozen=True)
class KillPlan:
    """When to kill one process.

    Attributes
    ----------
    phase : str
        ``"startup"`` (``delay`` s after the spawn: imports, config, model loading, lock),
        ``"created"`` (``delay`` s after the output first appears on disk) or ``"commits"``
        (``delay`` s after the committed step count first reaches ``at_step``).
    delay : float
        Seconds.
    at_step : int
        For ``"commits"``: the committed step count to wait for.
    group : bool
        Kill the whole process group (a scheduler's kill) instead of the process alone.
    """

    phase: str
    delay: float
    at_step: int = 0
    group: bool = False


def folder_for_test(space: Path, request: pytest.FixtureRequest) -> Path:
    """A fresh folder for one test inside a module's scratch space, named after the test."""
    name = "".join(c if c.isalnum() else "_" for c in request.node.name)
    folder = space / name
    folder.mkdir()
    return folder


@contextmanager
def scratch(path: Path, size_mib: int = 1024) -> Iterator[Path]:
    """A tmpfs at ``path`` for the block if one can be mounted, else the plain folder.

    On a tmpfs, fsync returns at once: the tests' timing then depends on chainyard, not on
    a disk shared with other jobs (measured here under load: a 3,000-step run with a commit
    every 20 steps took 4.5 min on the shared disk and 11 s on a tmpfs). A SIGKILL leaves
    the page cache, so what a killed process wrote is seen exactly as on a disk.
    """
    path.mkdir(parents=True, exist_ok=True)
    res = _mount("-t", "tmpfs", "-o", f"size={size_mib}m", "tmpfs", str(path))
    try:
        yield path
    finally:
        if res.returncode == 0:
            for _ in range(50):
                if subprocess.run(["umount", str(path)], capture_output=True).returncode == 0:
                    break
                time.sleep(0.1)
            else:
                subprocess.run(["umount", "-l", str(path)], capture_output=True)


def execute(
    plan: KillPlan,
    proc: subprocess.Popen[str],
    appeared: Callable[[], bool],
    steps: Callable[[], int],
) -> bool:
    """Wait for the plan's moment, then SIGKILL; True if the process was killed."""
    ok = True
    if plan.phase == "created":
        ok = wait_for(appeared, proc)
    elif plan.phase == "commits":
        ok = wait_for(lambda: steps() >= plan.at_step, proc)
    if ok:
        time.sleep(plan.delay)
    return kill(proc, group=plan.group)
