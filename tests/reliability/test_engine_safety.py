"""Engine safety under faults: uncommitted stores, kills before the first commit, SIGTERM while
the model hangs, abnormal ends, non-deterministic models and refused writes.

Every run is a real ``chainyard`` process on a real store; comparisons are bitwise against an
uninterrupted run of the same config in its own process. Exit statuses are the documented
table in chainyard.errors; "one line" is the project's rule for user-facing errors.
"""

from __future__ import annotations

import contextlib
import os
import resource
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

import chainyard
from tests.conftest import assert_same_store, base_config, cli, write_run
from tests.patience import PATIENCE, patient
from tests.reliability.conftest import Tally, mounted, snapshot

# 300 steps, chunks of 64, commits every 50: several chunks and commits in a short run
SMALL = base_config(
    sampler={"walkers": 16, "steps": 300},
    storage={"chunk_steps": 64, "commit_every_steps": 50, "commit_every_seconds": 0.05},
)

#: a standard-normal model that, when the file "hang.flag" exists in the working folder,
#: announces itself and sleeps forever after 2,000 calls (it is deterministic otherwise)
HANG_MODEL = """
import os
import time
import numpy as np

CALLS = [0]

def log_prob(theta, data):
    CALLS[0] += 1
    if CALLS[0] > 2000 and os.path.exists("hang.flag"):
        open("hanging.flag", "w").close()
        while True:
            time.sleep(1)
    return -0.5 * float(np.dot(theta, theta))
"""

#: a standard-normal model that, when "exit.flag" exists, ends the interpreter with
#: os._exit(0) after 2,000 calls (an end nothing in Python can catch)
EXIT_MODEL = """
import os
import numpy as np

CALLS = [0]

def log_prob(theta, data):
    CALLS[0] += 1
    if CALLS[0] > 2000 and os.path.exists("exit.flag"):
        os._exit(0)
    return -0.5 * float(np.dot(theta, theta))
"""

#: draws from numpy's global RNG inside log_prob
GLOBAL_RNG_MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * float(np.dot(theta, theta)) + 1e-9 * np.random.standard_normal()
"""

#: reads the clock inside log_prob
CLOCK_MODEL = """
import time
import numpy as np

def log_prob(theta, data):
    return -0.5 * float(np.dot(theta, theta)) + 1e-6 * (time.time() % 1.0)
"""

#: counts its calls and writes the count to calls.txt at exit
COUNTING_MODEL = """
import atexit
import numpy as np

CALLS = [0]
atexit.register(lambda: open("calls.txt", "w").write(str(CALLS[0])))

def log_prob(theta, data):
    CALLS[0] += 1
    return -0.5 * float(np.dot(theta, theta))
"""


@pytest.fixture(scope="module")
def reference(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """An uninterrupted run of SMALL with the Gaussian model, made by its own process."""
    folder = tmp_path_factory.mktemp("reference")
    cfg = write_run(folder, SMALL)
    res = cli("sample", str(cfg), "--out", "ref.zarr", "--progress", "off", cwd=folder)
    assert res.returncode == 0, res.stderr
    return folder / "ref.zarr"


def _error_line(res: subprocess.CompletedProcess[str]) -> str:
    """The single error line of a failed command (status lines may precede it; no traceback)."""
    assert "Traceback" not in res.stderr, res.stderr
    lines = [x for x in res.stderr.splitlines() if x.startswith("chainyard: error: ")]
    assert len(lines) == 1, res.stderr
    return lines[0]


def _no_partial_files(folder: Path) -> None:
    left = [str(p) for p in folder.rglob("*.partial")]
    assert not left, f"temporary files left behind: {left}"


def _sample(folder: Path, *extra: str, env: dict[str, str] | None = None):  # type: ignore[no-untyped-def]
    return cli(
        "sample", "run.yaml", "--out", "s.zarr", "--progress", "off", *extra, cwd=folder, env=env
    )


# ---------------------------------------------------------------- item 2: no commit record
def test_chunks_without_commit_record_refused(tmp_path: Path, tally: Tally) -> None:
    """A store whose commit.json is gone but whose chunks remain is refused (exit 4, one
    line, bytes unchanged); --restart discards it and samples afresh."""
    write_run(tmp_path, SMALL)
    assert _sample(tmp_path).returncode == 0
    store = tmp_path / "s.zarr"
    (store / "commit.json").unlink()
    before = snapshot(store)
    res = _sample(tmp_path)
    tally.fault()
    assert res.returncode == 4, res.stderr
    line = _error_line(res)
    assert "s.zarr: holds sampled chunk files but no commit record" in line
    assert "--restart" in line
    tally.assert_intact(before, store)
    assert snapshot(store) == before  # nothing added either
    res = _sample(tmp_path, "--restart")
    assert res.returncode == 0, res.stderr
    assert chainyard.open_store(store).steps_done == 300


def test_missing_last_chunk_refused_before_extending(tmp_path: Path, tally: Tally) -> None:
    """A store whose last committed chunk file is gone is refused before anything is
    appended (exit 4, one line naming the chunk), not blamed on the model."""
    write_run(tmp_path, SMALL)
    assert _sample(tmp_path).returncode == 0
    store = tmp_path / "s.zarr"
    (store / "draws" / "position" / "c" / "4" / "0" / "0").unlink()  # steps 256-299
    before = snapshot(store)
    res = _sample(tmp_path, "--steps", "400")
    tally.fault()
    assert res.returncode == 4, res.stderr
    line = _error_line(res)
    assert "draws/position chunk 4" in line and "missing" in line
    assert "diverged" not in line
    tally.assert_intact(before, store)


# ------------------------------------------------- item 3: kills before the first data commit
@pytest.mark.slow
@pytest.mark.parametrize("instant", ["store-created", "chunks-written:1", "commit-replaced:1"])
def test_kill_before_first_commit_then_rerun(
    instant: str, tmp_path: Path, reference: Path, tally: Tally
) -> None:
    """SIGKILL at a named instant around the first data commit, then rerun: bitwise equal to
    an uninterrupted run, and verify passes (the first segment is a start)."""
    write_run(tmp_path, SMALL)
    res = _sample(tmp_path, env={"CHAINYARD_TEST_KILL_AT": instant})
    assert res.returncode == -signal.SIGKILL, res.stderr
    res = _sample(tmp_path)
    assert res.returncode == 0, res.stderr
    assert "ended abnormally" in res.stderr  # the marker reports the killed run
    assert_same_store(tmp_path / "s.zarr", reference)
    ver = cli("verify", str(tmp_path / "s.zarr"))
    assert ver.returncode == 0, ver.stdout + ver.stderr
    record = chainyard.open_store(tmp_path / "s.zarr").commit_record
    assert record["segments"][0]["kind"] == "start"
    tally.killed()


# ---------------------------------------------------------- item 4: SIGTERM, model hangs
@pytest.mark.slow
def test_sigterm_while_model_hangs(tmp_path: Path, reference: Path, tally: Tally) -> None:
    """A model that hangs: SIGTERM stops the run within the grace period (exit 143), the last
    commit is intact, and a rerun with the hang switched off finishes bitwise equal."""
    from chainyard.engine.guards import committed_steps
    from chainyard.engine.stopping import STOP_GRACE_SECONDS

    # commits on the thread at steps 50 and 100 only; the model hangs at step 125
    storage = {**SMALL["storage"], "commit_writer": "thread", "commit_every_seconds": 3600}
    write_run(tmp_path, {**SMALL, "storage": storage}, HANG_MODEL)
    (tmp_path / "hang.flag").touch()
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "chainyard.cli",
            "sample",
            "run.yaml",
            "--out",
            "s.zarr",
            "--progress",
            "off",
        ],
        cwd=tmp_path,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        deadline = time.monotonic() + PATIENCE
        while not (tmp_path / "hanging.flag").exists():
            assert proc.poll() is None and time.monotonic() < deadline, "model never hung"
            time.sleep(0.02)
        # the commit of step 100 is done (its record is replaced last) before the snapshot
        while committed_steps(tmp_path / "s.zarr") != 100:
            assert proc.poll() is None and time.monotonic() < deadline, "no commit at step 100"
            time.sleep(0.02)
        before = snapshot(tmp_path / "s.zarr")
        sent = time.monotonic()
        proc.send_signal(signal.SIGTERM)
        # part of what is tested: the run stops after the grace period, where the model alone
        # would hang for ever; the bound allows for a loaded machine (see tests/patience.py)
        _, err = proc.communicate(timeout=STOP_GRACE_SECONDS + patient(10))
        took = time.monotonic() - sent
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    tally.fault()
    assert proc.returncode == 128 + signal.SIGTERM, err
    assert STOP_GRACE_SECONDS - 0.5 <= took <= STOP_GRACE_SECONDS + patient(5), took
    lines = [x for x in err.strip().splitlines() if "stopped by SIGTERM" in x]
    assert len(lines) == 1, err
    assert f"still running {STOP_GRACE_SECONDS:g} s after the signal" in lines[0]
    assert "is intact" in lines[0]
    tally.assert_intact(before, tmp_path / "s.zarr")
    assert not (tmp_path / ".s.zarr.running").exists()
    (tmp_path / "hang.flag").unlink()
    res = _sample(tmp_path)
    assert res.returncode == 0, res.stderr
    assert "ended abnormally" not in res.stderr
    assert_same_store(tmp_path / "s.zarr", reference)


# ------------------------------------------------------------ item 5: abnormal end marker
@pytest.mark.slow
def test_os_exit_in_model_reported_by_next_run(
    tmp_path: Path, reference: Path, tally: Tally
) -> None:
    """os._exit(0) inside the model leaves the marker; the next run says the previous one
    ended abnormally after step S (S = the committed steps) and finishes bitwise equal."""
    write_run(tmp_path, SMALL, EXIT_MODEL)
    (tmp_path / "exit.flag").touch()
    res = _sample(tmp_path)
    tally.fault()
    assert res.returncode == 0  # os._exit(0): nothing in the process can report it
    marker = tmp_path / ".s.zarr.running"
    assert marker.is_file()
    steps = chainyard.open_store(tmp_path / "s.zarr").steps_done
    assert 0 <= steps < 300
    (tmp_path / "exit.flag").unlink()
    res = _sample(tmp_path)
    assert res.returncode == 0, res.stderr
    lines = [x for x in res.stderr.splitlines() if "ended abnormally" in x]
    assert len(lines) == 1, res.stderr
    assert lines[0].startswith("s.zarr: previous run (pid ")
    assert lines[0].endswith(
        f"ended abnormally after committing step {steps:,}; resuming from there"
    )
    assert not marker.exists()
    assert_same_store(tmp_path / "s.zarr", reference)


def test_marker_removed_after_errors(tmp_path: Path) -> None:
    """The run-in-progress marker is gone after a normal run and after a handled error."""
    write_run(tmp_path, SMALL)
    assert _sample(tmp_path).returncode == 0
    assert not (tmp_path / ".s.zarr.running").exists()
    (tmp_path / "run.yaml").write_text(
        (tmp_path / "run.yaml").read_text().replace("seed: 7", "seed: 8")
    )
    assert _sample(tmp_path, "--steps", "400").returncode == 5
    assert not (tmp_path / ".s.zarr.running").exists()


# ------------------------------------------------------------- item 6: determinism check
@pytest.mark.parametrize("model", [GLOBAL_RNG_MODEL, CLOCK_MODEL], ids=["global-rng", "clock"])
def test_nondeterministic_model_refused(model: str, tmp_path: Path, tally: Tally) -> None:
    """A model drawing from numpy's global RNG or reading the clock stops with exit 3 and
    one line naming the walker and where randomness must come from; nothing is kept."""
    write_run(tmp_path, SMALL, model)
    res = _sample(tmp_path)
    tally.fault()
    assert res.returncode == 3, res.stderr
    line = _error_line(res)
    assert line.startswith("chainyard: error: log_prob is not deterministic: walker ")
    assert "log_prob must be a pure function of theta and data (no numpy global RNG" in line
    assert "put a seed in the data" in line
    assert not (tmp_path / "s.zarr").exists()  # a fresh store that never committed


def test_determinism_check_costs_one_ensemble_call(tmp_path: Path) -> None:
    """With the check on, a deterministic model is called once more per walker than with it
    off (one evaluation of the stored start) plus at most one call per commit (the later-step
    check of engine/recheck.py: one state per commit), and both runs store the same draws."""
    counts = {}
    for check in (True, False):
        folder = tmp_path / str(check)
        cfg = {**SMALL, "model": {"log_prob": "model.py:log_prob", "check_deterministic": check}}
        write_run(folder, cfg, COUNTING_MODEL)
        res = _sample(folder)
        assert res.returncode == 0, res.stderr
        counts[check] = int((folder / "calls.txt").read_text())
    extra = counts[True] - counts[False] - SMALL["sampler"]["walkers"]
    # commits come at most every step (commit_every_seconds 0.05); never more than one per step
    assert 0 <= extra <= SMALL["sampler"]["steps"], counts
    assert_same_store(tmp_path / "True" / "s.zarr", tmp_path / "False" / "s.zarr")


# ---------------------------------------------------------------- item 7: storage faults
#: uncompressed chunks of 500 steps: 500 x 16 x 2 x 8 bytes = 128 KiB per position chunk
BIG_CHUNKS = base_config(
    sampler={"walkers": 16, "steps": 500},
    storage={"chunk_steps": 500, "codec": "none", "commit_every_steps": 250},
)


def _limit_file_size(limit: int):  # type: ignore[no-untyped-def]
    def apply() -> None:
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    return apply


@pytest.mark.slow
@pytest.mark.parametrize("writer", ["thread", "process"])
def test_file_size_limit_is_a_storage_fault(writer: str, tmp_path: Path, tally: Tally) -> None:
    """Under ulimit -f (64 KiB) an extension whose chunk file would pass the limit ends with
    exit 8 and one line (path, EFBIG, last committed step); the store is unchanged and no
    temporary file is left. The helper's shared memory falls back to the thread writer."""
    cfg = {**BIG_CHUNKS, "storage": {**BIG_CHUNKS["storage"], "commit_writer": writer}}
    write_run(tmp_path, cfg)
    assert _sample(tmp_path).returncode == 0
    store = tmp_path / "s.zarr"
    # the committed rows and the start; an extension may grow the arrays' shape and record
    # the new step target in the metadata before its first commit
    before = {k: v for k, v in snapshot(store).items() if "/c/" in k}
    res = subprocess.run(
        [
            sys.executable,
            "-m",
            "chainyard.cli",
            "sample",
            "run.yaml",
            "--out",
            "s.zarr",
            "--progress",
            "off",
            "--steps",
            "1500",
        ],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        timeout=PATIENCE,
        preexec_fn=_limit_file_size(64 * 1024),
    )
    tally.fault()
    assert res.returncode == 8, res.stderr
    line = _error_line(res)
    assert "File too large [EFBIG]" in line
    assert "the last commit (step 500) is intact" in line
    tally.assert_intact(before, store)
    _no_partial_files(tmp_path)
    assert cli("verify", str(store)).returncode == 0


@contextlib.contextmanager
def _tmpfs(folder: Path, size: str) -> Iterator[Path]:
    """A tmpfs of ``size`` mounted on ``folder`` (skips the test where mounting is refused)."""
    folder.mkdir(parents=True, exist_ok=True)
    if os.geteuid() != 0:
        pytest.skip("mounting a size-limited tmpfs needs root (CI runs as root)")
    args = ["-t", "tmpfs", "-o", f"size={size}", "tmpfs"]
    with mounted(args, folder, "mount -t tmpfs refused here"):
        yield folder


def _remount_ro(folder: Path) -> None:
    res = subprocess.run(["mount", "-o", "remount,ro", str(folder)], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr


@pytest.mark.slow
def test_read_only_mount(tmp_path: Path, tally: Tally) -> None:
    """On a read-only mount a complete store reports "nothing to do" (exit 0, nothing
    written); asking for more steps ends with exit 8 and one line; bytes unchanged."""
    write_run(tmp_path, SMALL)
    with _tmpfs(tmp_path / "mnt", "2m") as mnt:
        res = cli(
            "sample", str(tmp_path / "run.yaml"), "--out", "s.zarr", "--progress", "off", cwd=mnt
        )
        assert res.returncode == 0, res.stderr
        (mnt / ".s.zarr.lock").unlink()  # a fresh folder: nothing beside the store
        _remount_ro(mnt)
        before = snapshot(mnt)
        res = cli(
            "sample", str(tmp_path / "run.yaml"), "--out", "s.zarr", "--progress", "off", cwd=mnt
        )
        assert res.returncode == 0, res.stderr
        assert "already complete (300 steps committed, 300 requested); nothing to do" in (
            res.stderr
        )
        res = cli(
            "sample",
            str(tmp_path / "run.yaml"),
            "--out",
            "s.zarr",
            "--progress",
            "off",
            "--steps",
            "400",
            cwd=mnt,
        )
        tally.fault()
        assert res.returncode == 8, res.stderr
        assert "Read-only file system" in _error_line(res)
        tally.assert_intact(before, mnt)
        assert snapshot(mnt) == before


@pytest.mark.slow
def test_disk_full_while_sampling(tmp_path: Path, tally: Tally) -> None:
    """A full disk (2 MiB tmpfs) while sampling: exit 8, one line naming ENOSPC and the last
    committed step; the committed rows equal an uninterrupted run's; no temporary files."""
    cfg = {**BIG_CHUNKS, "sampler": {"walkers": 16, "steps": 20000}}
    write_run(tmp_path / "ref", cfg)
    with _tmpfs(tmp_path / "mnt", "2m") as mnt:
        res = cli(
            "sample",
            str(tmp_path / "ref" / "run.yaml"),
            "--out",
            "s.zarr",
            "--progress",
            "off",
            cwd=mnt,
        )
        tally.fault()
        assert res.returncode == 8, res.stderr
        line = _error_line(res)
        assert "No space left on device [ENOSPC]" in line
        store = chainyard.open_store(mnt / "s.zarr")
        steps = store.steps_done
        assert f"the last commit (step {steps}) is intact" in line
        _no_partial_files(mnt)
        assert cli("verify", str(mnt / "s.zarr")).returncode == 0
        ref = cli(
            "sample",
            "run.yaml",
            "--out",
            "r.zarr",
            "--progress",
            "off",
            "--steps",
            str(steps),
            cwd=tmp_path / "ref",
        )
        assert ref.returncode == 0, ref.stderr
        import numpy as np

        other = chainyard.open_store(tmp_path / "ref" / "r.zarr")
        assert np.array_equal(store.draws(), other.draws())
        assert np.array_equal(store.log_prob(), other.log_prob())


@pytest.mark.slow
def test_disk_full_at_creation(tmp_path: Path, tally: Tally) -> None:
    """A disk too small for the new store: exit 8, one line naming ENOSPC, nothing left."""
    write_run(tmp_path, SMALL)
    with _tmpfs(tmp_path / "mnt", "24k") as mnt:
        res = cli(
            "sample", str(tmp_path / "run.yaml"), "--out", "s.zarr", "--progress", "off", cwd=mnt
        )
        tally.fault()
        assert res.returncode == 8, res.stderr
        assert "No space left on device [ENOSPC]" in _error_line(res)
        assert not (mnt / "s.zarr").exists()
        _no_partial_files(mnt)


@pytest.mark.parametrize("bad", [float("nan"), float("inf")], ids=["nan", "inf"])
def test_non_finite_initial_positions_refused(bad: float, tmp_path: Path, tally: Tally) -> None:
    """A NaN or inf in sampler.initial_positions is a config error (exit 2) naming the
    file, walker and parameter, not a model error; no store is made."""
    import numpy as np

    start = np.column_stack([np.linspace(-1, 1, 16), np.linspace(0, 2, 16) ** 2])
    start[2, 1] = bad
    np.save(tmp_path / "start.npy", start)
    cfg = {**SMALL, "sampler": {**SMALL["sampler"], "initial_positions": "start.npy"}}
    write_run(tmp_path, cfg)
    res = _sample(tmp_path)
    tally.input()
    assert res.returncode == 2, res.stderr
    assert _error_line(res).endswith(
        f"sampler.initial_positions: start.npy: walker 2, parameter y is {bad}; every start "
        "must be a finite number"
    )
    assert not (tmp_path / "s.zarr").exists()
