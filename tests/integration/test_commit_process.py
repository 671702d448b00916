"""The commit helper process: same bytes as the thread, dies with the sampler, fails loudly.

Real processes throughout: the sampler is ``chainyard sample`` in a subprocess, its helper is
found in /proc by parent pid and command line, and kills are real SIGKILLs.
"""

from __future__ import annotations

import os
import signal
import time
from pathlib import Path

import pytest

import chainyard
from chainyard.engine.writer import process_writer_available
from tests.conftest import (
    SLOW_MODEL,
    assert_same_store,
    base_config,
    cli,
    held_env,
    popen_cli,
    tree_snapshot,
    write_run,
)
from tests.patience import PATIENCE, patient

pytestmark = pytest.mark.skipif(
    not process_writer_available(), reason="the commit helper process needs Linux"
)

def _config(writer: str, steps: int = 2400) -> dict:
    return base_config(
        sampler={"walkers": 16, "steps": steps},
        storage={"chunk_steps": 64, "commit_every_steps": 50, "commit_every_seconds": 0.05,
                 "commit_writer": writer},
    )


def _helpers(parent: int) -> list[int]:
    """Pids of commit helper processes whose parent is ``parent``."""
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
            cmd = (entry / "cmdline").read_bytes().decode(errors="replace")
        except OSError:
            continue
        ppid = int(stat.rsplit(")", 1)[1].split()[1])
        if ppid == parent and "chainyard.engine.commit_process" in cmd:
            found.append(int(entry.name))
    return found


def _helper_writing(parent: int) -> bool:
    """True once the sampler's helper has written chunk files (the thread hands over to it
    when the helper is ready; until then commits stay on the thread)."""
    for pid in _helpers(parent):
        try:
            io = dict(ln.split(": ") for ln in Path(f"/proc/{pid}/io").read_text().splitlines())
        except OSError:
            continue
        if int(io["wchar"]) > 100_000:
            return True
    return False


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


def _wait_for(predicate, timeout: float = PATIENCE) -> None:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if predicate():
            return
        time.sleep(0.01)
    raise AssertionError("timed out")


def _committed(store: Path) -> int:
    try:
        return chainyard.open_store(store).steps_done
    except chainyard.StoreError:
        return 0


def _start_with_helper(tmp_path: Path, name: str, min_steps: int):
    """Start a helper-process run; return (config, store, sampler process, helper pid) once
    the helper writes chunks and ``min_steps`` are committed.

    Until then the model is held slow (:func:`~tests.conftest.held_env`), so the run cannot
    end before its helper, however slow to start, has taken over. The sampler is returned *stopped*
    (SIGSTOP), so that it cannot finish between this check and what the test does next; the
    hold is lifted, and the caller sends SIGCONT after its own signal.
    """
    cfg = write_run(tmp_path, _config("process"), SLOW_MODEL)
    out = tmp_path / name
    hold = tmp_path / "hold"
    # after about 1,000 of its 2,400 steps the run crawls (5 ms per call) until released
    env = held_env(hold, after_calls=16_000, pause=0.005)
    proc = popen_cli("sample", str(cfg), "--out", str(out), "--progress", "off", env=env)
    found: list[int] = []

    def ready() -> bool:
        if proc.poll() is not None:
            err = proc.stderr.read() if proc.stderr else ""
            raise AssertionError(f"the run ended before its helper took over: {err}")
        if not (_helper_writing(proc.pid) and _committed(out) >= min_steps):
            return False
        proc.send_signal(signal.SIGSTOP)
        helpers = _helpers(proc.pid)
        if len(helpers) == 1 and proc.poll() is None:
            found.append(helpers[0])
            return True
        proc.send_signal(signal.SIGCONT)
        return False

    _wait_for(ready)
    hold.unlink()
    return cfg, out, proc, found[0]


@pytest.fixture(scope="module")
def thread_reference(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """An uninterrupted run committing on the thread."""
    folder = tmp_path_factory.mktemp("thread")
    cfg = write_run(folder, _config("thread"), SLOW_MODEL)
    res = cli("sample", str(cfg), "--out", str(folder / "ref.zarr"), "--progress", "off")
    assert res.returncode == 0, res.stderr
    return folder / "ref.zarr"


def test_same_store_as_the_thread(tmp_path: Path, thread_reference: Path) -> None:
    """Committed by the helper, the store equals the thread's: rows, chunk files, checksums.

    SIGTERM and SIGINT sent to the helper itself are ignored (the sampler decides when to
    stop), and the store verifies.
    """
    _, out, proc, helper = _start_with_helper(tmp_path, "p.zarr", 300)
    os.kill(helper, signal.SIGTERM)
    os.kill(helper, signal.SIGINT)
    proc.send_signal(signal.SIGCONT)
    _, err = proc.communicate(timeout=PATIENCE)
    assert proc.returncode == 0, err
    assert_same_store(out, thread_reference)
    ours, theirs = tree_snapshot(out / "draws"), tree_snapshot(thread_reference / "draws")
    assert ours == theirs  # every chunk file and array metadata, byte for byte
    assert not _alive(helper)
    res = cli("verify", str(out))
    assert res.returncode == 0, res.stdout + res.stderr


@pytest.mark.slow
def test_helper_dies_with_the_sampler(tmp_path: Path, thread_reference: Path) -> None:
    """SIGKILL of the sampler takes its helper down at once; the lock is free; resume exact."""
    cfg, out, proc, helper = _start_with_helper(tmp_path, "k.zarr", 500)
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=PATIENCE)
    # part of what is tested: the helper goes with the sampler, not whenever it likes; the
    # bound is generous for a loaded machine (see tests/patience.py)
    _wait_for(lambda: not _alive(helper), timeout=patient(5))
    assert _committed(out) < 2400
    res = cli("sample", str(cfg), "--out", str(out), "--progress", "off")
    assert res.returncode == 0, res.stderr
    assert "resuming replica 0 at step" in res.stderr
    assert_same_store(out, thread_reference)


@pytest.mark.slow
def test_killed_helper_stops_the_run_cleanly(tmp_path: Path, thread_reference: Path) -> None:
    """A helper that dies mid-run: one-line store error, exit 4, committed prefix intact."""
    cfg, out, proc, helper = _start_with_helper(tmp_path, "h.zarr", 300)
    os.kill(helper, signal.SIGKILL)
    proc.send_signal(signal.SIGCONT)
    _, err = proc.communicate(timeout=PATIENCE)
    assert proc.returncode == 4, err
    last = err.strip().splitlines()[-1]
    assert "the commit process ended unexpectedly" in last and "rerun to continue" in last
    assert "Traceback" not in err
    assert 300 <= _committed(out) < 2400
    res = cli("sample", str(cfg), "--out", str(out), "--progress", "off")
    assert res.returncode == 0, res.stderr
    assert_same_store(out, thread_reference)


def test_auto_uses_the_helper_for_long_runs_only(tmp_path: Path) -> None:
    """'auto' commits on the thread for a short run and in the helper for a long one."""
    for steps, expected in ((400, 0), (6000, 1)):
        cfg = write_run(tmp_path / str(steps), _config("auto", steps))
        out = tmp_path / f"{steps}.zarr"
        proc = popen_cli("sample", str(cfg), "--out", str(out), "--progress", "off")
        seen: set[int] = set()
        while proc.poll() is None:
            seen.update(_helpers(proc.pid))
            time.sleep(0.02)
        assert proc.returncode == 0, proc.stderr.read() if proc.stderr else ""
        assert len(seen) == expected, (steps, seen)
        assert chainyard.open_store(out).steps_done == steps
