"""Exactness: separate processes, SIGKILL at random moments, resume, extension, SIGTERM.

Every comparison is bitwise (np.array_equal) against an uninterrupted run in a separate
process with the same config, seed and replica.
"""

from __future__ import annotations

import signal
import time
from pathlib import Path

import numpy as np
import pytest

import chainyard
from tests.conftest import (
    SLOW_MODEL,
    assert_same_store,
    base_config,
    cli,
    held_env,
    popen_cli,
    write_run,
)
from tests.patience import PATIENCE

# 2,400 steps with chunks of 64 steps and commits every 50 steps: commits cut chunks in the
# middle, so kills land before, inside and after chunk writes and commit-record renames.
KILL_CONFIG = base_config(
    sampler={"walkers": 16, "steps": 2400},
    storage={"chunk_steps": 64, "commit_every_steps": 50, "commit_every_seconds": 0.05},
)



@pytest.fixture(scope="module")
def reference(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """An uninterrupted run of KILL_CONFIG, made by its own process."""
    folder = tmp_path_factory.mktemp("reference")
    cfg = write_run(folder, KILL_CONFIG, SLOW_MODEL)
    res = cli("sample", str(cfg), "--out", str(folder / "ref.zarr"), "--progress", "off")
    assert res.returncode == 0, res.stderr
    return folder / "ref.zarr"


def test_two_processes_identical(run_dir: Path, tmp_path: Path) -> None:
    """Same config and seed in two separate processes: identical draws, log-prob, acceptance."""
    a = cli("sample", "run.yaml", "--out", "a.zarr", cwd=run_dir)
    b = cli("sample", "run.yaml", "--out", "b.zarr", cwd=run_dir)
    assert a.returncode == 0 and b.returncode == 0, a.stderr + b.stderr
    assert_same_store(run_dir / "a.zarr", run_dir / "b.zarr")
    store = chainyard.open_store(run_dir / "a.zarr")
    assert store.draws().shape == (2000, 16, 2)
    assert store.param_names == ("x", "y")
    assert 0.0 < store.accepted().mean() < 1.0


def _wait_for_commits(
    proc_start: float, store: Path, min_steps: int, timeout: float = PATIENCE
) -> None:
    """Wait until ``store`` has at least ``min_steps`` committed (or the time runs out)."""
    while time.monotonic() - proc_start < timeout:
        try:
            if chainyard.open_store(store).steps_done >= min_steps:
                return
        except chainyard.StoreError:
            pass
        time.sleep(0.005)


def _with_writer(writer: str) -> dict:
    """KILL_CONFIG committing on the given writer (a thread, or the helper process)."""
    return {**KILL_CONFIG, "storage": {**KILL_CONFIG["storage"], "commit_writer": writer}}


@pytest.mark.slow
@pytest.mark.parametrize("writer", ["thread", "process"])
@pytest.mark.parametrize("seed", [11, 12, 13])
def test_sigkill_then_resume_is_exact(
    seed: int, writer: str, tmp_path: Path, reference: Path
) -> None:
    """SIGKILL at random moments (twice, the second during a resume), then finish: identical."""
    rng = np.random.default_rng(seed)
    cfg = write_run(tmp_path, _with_writer(writer), SLOW_MODEL)
    out = tmp_path / "killed.zarr"
    kills = 0
    # each process crawls after 800 steps of its own (16 calls a step): the first is killed
    # at step 100 or later, so the second, waited for at step 900, cannot end before its kill
    hold = held_env(tmp_path / "hold", after_calls=12_800, pause=0.05)
    for attempt in range(2):
        proc = popen_cli("sample", str(cfg), "--out", str(out), "--progress", "off", env=hold)
        start = time.monotonic()
        # wait until the run is under way (past imports and the first commits), then a
        # random extra delay so the kill lands at an arbitrary point of the commit cycle
        _wait_for_commits(start, out, 100 + 800 * attempt)
        time.sleep(float(rng.uniform(0.0, 0.5)))
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
            kills += 1
        proc.wait(timeout=PATIENCE)
    assert kills >= 1
    mid = chainyard.open_store(out).steps_done
    assert mid < 2400
    res = cli("sample", str(cfg), "--out", str(out), "--progress", "off")
    assert res.returncode == 0, res.stderr
    assert "resuming replica 0 at step" in res.stderr
    assert_same_store(out, reference)


@pytest.mark.parametrize("writer", ["thread", "process"])
def test_sigterm_commits_and_resumes(writer: str, tmp_path: Path, reference: Path) -> None:
    """SIGTERM (a wall-time limit) commits the finished steps, exits 143, resumes exactly."""
    cfg = write_run(tmp_path, _with_writer(writer), SLOW_MODEL)
    out = tmp_path / "term.zarr"
    hold = held_env(tmp_path / "hold", after_calls=6400, pause=0.05)  # crawls after 400 steps
    proc = popen_cli("sample", str(cfg), "--out", str(out), "--progress", "off", env=hold)
    _wait_for_commits(time.monotonic(), out, 300)
    assert proc.poll() is None
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=PATIENCE)
    assert proc.returncode == 143, err
    assert "stopped by SIGTERM at step" in err
    assert 300 <= chainyard.open_store(out).steps_done < 2400
    res = cli("sample", str(cfg), "--out", str(out), "--progress", "off")
    assert res.returncode == 0, res.stderr
    assert_same_store(out, reference)


def test_extend_equals_direct_run(tmp_path: Path) -> None:
    """1,000 steps extended to 3,000 equals a direct 3,000-step run."""
    cfg = write_run(
        tmp_path, base_config(sampler={"walkers": 16, "steps": 1000}, storage={"chunk_steps": 300})
    )
    assert cli("sample", str(cfg), "--out", "short.zarr", cwd=tmp_path).returncode == 0
    res = cli("sample", str(cfg), "--out", "short.zarr", "--steps", "3000", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert "extending replica 0 at step 1,000 of 3,000" in res.stderr
    res = cli("sample", str(cfg), "--out", "direct.zarr", "--steps", "3000", cwd=tmp_path)
    assert res.returncode == 0
    assert_same_store(tmp_path / "short.zarr", tmp_path / "direct.zarr")
    segments = chainyard.open_store(tmp_path / "short.zarr").commit_record["segments"]
    assert [(s["kind"], s["from_step"], s["to_step"]) for s in segments] == [
        ("start", 0, 1000),
        ("extend", 1000, 3000),
    ]


def test_finished_store_is_left_alone(run_dir: Path) -> None:
    """Rerunning on a finished store does nothing, says so, and changes no byte."""
    from tests.conftest import tree_snapshot

    assert cli("sample", "run.yaml", "--out", "s.zarr", cwd=run_dir).returncode == 0
    before = tree_snapshot(run_dir / "s.zarr")
    res = cli("sample", "run.yaml", "--out", "s.zarr", cwd=run_dir)
    assert res.returncode == 0
    assert "already complete (2,000 steps committed, 2,000 requested); nothing to do" in res.stderr
    assert tree_snapshot(run_dir / "s.zarr") == before


def test_progress_log_lines(run_dir: Path) -> None:
    """Without a terminal, progress is plain lines with steps, rate, acceptance and ETA."""
    res = cli("sample", "run.yaml", "--out", "s.zarr", "--progress-interval", "0.001", cwd=run_dir)
    assert res.returncode == 0
    lines = [ln for ln in res.stderr.splitlines() if "steps/s" in ln]
    assert lines, res.stderr
    assert "\r" not in res.stderr
    import re

    assert re.fullmatch(
        r"s\.zarr: step [0-9,]+/2,000 \([0-9.]+%\) \| [0-9,]+ steps/s \| acceptance 0\.[0-9]{3} "
        r"\| ETA [0-9]+:[0-9]{2}:[0-9]{2}",
        lines[-1],
    ), lines[-1]
