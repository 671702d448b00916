"""``sample --workers``: the worker pool gives a serial run's draws and errors, bit for bit.

Every run is the real command line in its own process, its workers real processes. The
reference for every pooled result is the same run made serially (``--workers 1``, the
behaviour before the pool existed): bitwise equal draws, log-probabilities, acceptance, blobs,
RNG state and chunk bytes; the same one-line error and exit status.
"""

from __future__ import annotations

import os
import signal
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import chainyard
from tests.conftest import (
    HOLD_CODE,
    assert_same_store,
    base_config,
    cli,
    held_env,
    popen_cli,
    write_run,
)
from tests.integration.test_exact_resume import _wait_for_commits
from tests.patience import PATIENCE, patient
from tests.reliability.conftest import snapshot

#: a scalar model with a blob, one bounded parameter (rows outside: -inf, model not called)
#: and a fault chosen by CY_FAULT for the error cases
SCALAR_MODEL = """
import os
import time

import numpy as np

FAULT = os.environ.get("CY_FAULT", "")


def log_prob(theta, data):
    if FAULT == "hang" and theta[0] > 0.8:
        time.sleep(600)
    if FAULT == "raise" and theta[0] > 0.8:
        raise ValueError("x too large for this model")
    if FAULT == "nan" and theta[1] < -0.7:
        return float("nan"), 0.0
    if FAULT == "exit" and theta[0] < -0.9:
        raise SystemExit(4)
    return -0.5 * float(theta @ theta), float(theta[0] * theta[1])
"""

#: the same target, vectorised: row-wise array code, so a row's value does not depend on
#: which rows share its call
VECTOR_MODEL = """
import numpy as np


def log_prob(theta, data):
    lp = -0.5 * np.einsum("ij,ij->i", theta, theta)
    return lp, theta[:, 0] * theta[:, 1]
"""

#: reports the worker's environment and process as blobs (threads cap and pid)
ENV_MODEL = """
import os


def log_prob(theta, data):
    threads = float(os.environ.get("OMP_NUM_THREADS", "-1"))
    blas = float(os.environ.get("OPENBLAS_NUM_THREADS", "-1"))
    return -0.5 * float(theta @ theta), threads, blas, float(os.getpid())
"""

#: about 0.2 ms per call: long enough for a kill to land mid-run; it can be held (HOLD_CODE;
#: calls are counted in each worker)
BUSY_MODEL = HOLD_CODE + """
import time


def log_prob(theta, data):
    t = time.perf_counter()
    while time.perf_counter() - t < 2e-4:
        pass
    hold()
    return -0.5 * float(theta @ theta)
"""


def _config(steps: int, vectorized: bool = False, **sampler: object) -> dict:
    cfg = base_config(
        sampler={"walkers": 16, "steps": steps, "blobs": ["xy"], **sampler},
        storage={"chunk_steps": 40},
    )
    cfg["parameters"][0]["bounds"] = [-1.5, None]
    cfg["model"]["vectorized"] = vectorized
    cfg["model"]["call_time_limit_seconds"] = 1.0
    return cfg


def _chunks(store: Path) -> dict[str, str]:
    """Hashes of the chunk files (the draws' bytes; the JSON metadata holds times and pids)."""
    return {k: v for k, v in snapshot(store).items() if not k.endswith(".json")}


def _sample(cfg: Path, out: Path, *extra: str, env: dict[str, str] | None = None) -> str:
    res = cli("sample", str(cfg), "--out", str(out), "--progress", "log", *extra, env=env)
    assert res.returncode == 0, res.stderr
    return res.stderr


@pytest.mark.parametrize("vectorized", [False, True], ids=["scalar", "vectorized"])
def test_pool_equals_serial_and_keeps_the_identity(vectorized: bool, tmp_path: Path) -> None:
    """2 and 3 workers give a serial run's bytes; a store extended with another worker count
    is neither refused nor restarted, and equals a direct run."""
    model = VECTOR_MODEL if vectorized else SCALAR_MODEL
    cfg = write_run(tmp_path, _config(200, vectorized), model)
    _sample(cfg, tmp_path / "serial.zarr")
    log = _sample(cfg, tmp_path / "two.zarr", "--workers", "2")
    assert "evaluating the model in 2 worker processes" in log
    _sample(cfg, tmp_path / "three.zarr", "--workers", "3", "--cpus", "3")
    for name in ("two.zarr", "three.zarr"):
        assert_same_store(tmp_path / "serial.zarr", tmp_path / name)
        assert _chunks(tmp_path / "serial.zarr") == _chunks(tmp_path / name)
    # half the steps serially, the rest with 2 workers: an extension, not a restart
    _sample(cfg, tmp_path / "mixed.zarr", "--steps", "100")
    log = _sample(cfg, tmp_path / "mixed.zarr", "--workers", "2")
    assert "extending replica 0 at step 100" in log, log
    assert "different settings" not in log
    assert_same_store(tmp_path / "serial.zarr", tmp_path / "mixed.zarr")


def _error_line(stderr: str) -> str:
    assert "Traceback" not in stderr, stderr
    lines = [ln for ln in stderr.splitlines() if ln.startswith("chainyard: error: ")]
    assert len(lines) == 1, stderr
    return lines[0]


@pytest.mark.parametrize("fault", ["raise", "nan", "exit", "hang"])
def test_worker_model_error_is_the_serial_error(fault: str, tmp_path: Path) -> None:
    """A model error in a worker ends in the serial run's line and exit 3; committed bytes
    are unchanged."""
    cfg = write_run(tmp_path, _config(60), SCALAR_MODEL)
    store = tmp_path / "s.zarr"
    _sample(cfg, store)
    before = _chunks(store)
    lines = []
    for workers in ("1", "2"):
        res = cli(
            "sample", str(cfg), "--out", str(store), "--steps", "400", "--progress", "off",
            "--workers", workers, env={"CY_FAULT": fault},
        )  # fmt: skip
        assert res.returncode == 3, res.stderr
        lines.append(_error_line(res.stderr))
        assert _chunks(store) == before
        assert chainyard.open_store(store).steps_done == 60
    assert lines[0] == lines[1]
    assert " at walker " in lines[0] or " at proposal " in lines[0], lines[0]
    assert "x=" in lines[0] and "y=" in lines[0]


def test_thread_caps_reach_the_workers(tmp_path: Path) -> None:
    """Each worker runs with OMP/OpenBLAS threads = cpus // workers, in its own process."""
    cfg_dict = _config(5)
    cfg_dict["sampler"]["blobs"] = ["omp", "openblas", "pid"]
    del cfg_dict["parameters"][0]["bounds"]
    cfg_dict["model"]["check_deterministic"] = False  # the pid blob depends on the worker
    cfg = write_run(tmp_path, cfg_dict, ENV_MODEL)
    env = {k: v for k, v in os.environ.items() if not k.endswith("_NUM_THREADS")}
    res = _run_env(cfg, tmp_path / "s.zarr", env, "--workers", "2", "--cpus", "4")
    assert res.returncode == 0, res.stderr
    store = chainyard.open_store(tmp_path / "s.zarr")
    assert set(np.unique(store.blob("omp"))) == {2.0}
    assert set(np.unique(store.blob("openblas"))) == {2.0}
    pids = set(np.unique(store.blob("pid")))
    assert len(pids) == 2  # two workers, neither the run's own process
    # a smaller cap the user set stays
    env["OMP_NUM_THREADS"] = "1"
    res = _run_env(cfg, tmp_path / "t.zarr", env, "--workers", "2", "--cpus", "4")
    assert res.returncode == 0, res.stderr
    store = chainyard.open_store(tmp_path / "t.zarr")
    assert set(np.unique(store.blob("omp"))) == {1.0}
    assert set(np.unique(store.blob("openblas"))) == {2.0}


def _run_env(cfg: Path, out: Path, env: dict[str, str], *extra: str):  # type: ignore[no-untyped-def]
    import subprocess

    return subprocess.run(
        [sys.executable, "-m", "chainyard.cli", "sample", str(cfg), "--out", str(out),
         "--progress", "off", *extra],
        capture_output=True, text=True, env=env, timeout=PATIENCE,
    )  # fmt: skip


def test_auto_stays_serial_for_a_cheap_model(tmp_path: Path) -> None:
    """``auto`` times the first calls of a cheap model and says in one line it stays serial."""
    cfg = write_run(tmp_path, _config(50, vectorized=True), VECTOR_MODEL)
    log = _sample(cfg, tmp_path / "a.zarr", "--workers", "auto", "--cpus", "2")
    auto = [ln for ln in log.splitlines() if "workers auto" in ln]
    assert len(auto) == 1 and "evaluating in this process" in auto[0], log
    assert "worker processes (BLAS" not in log


def _children(pid: int) -> list[int]:
    """The child processes of ``pid`` (Linux /proc)."""
    try:
        text = Path(f"/proc/{pid}/task/{pid}/children").read_text()
    except OSError:
        return []
    return [int(p) for p in text.split()]


def _workers_of(proc_pid: int, n: int, timeout: float = PATIENCE) -> list[int]:
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        found = [c for c in _children(proc_pid) if _is_worker(c)]
        if len(found) >= n:
            return found
        time.sleep(0.05)
    raise AssertionError(f"no {n} workers seen")


def _is_worker(pid: int) -> bool:
    try:
        return b"chainyard.engine.processes" in Path(f"/proc/{pid}/cmdline").read_bytes()
    except OSError:
        return False


def _alive(pid: int) -> bool:
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return False
    return stat.rsplit(")", 1)[1].split()[0] != "Z"


def _wait_steps(store: Path, steps: int, timeout: float = PATIENCE) -> None:
    _wait_for_commits(time.monotonic(), store, steps, timeout)
    assert chainyard.open_store(store).steps_done >= steps, f"{store} never reached {steps}"


KILL_CONFIG = base_config(
    sampler={"walkers": 16, "steps": 600},
    storage={"chunk_steps": 32, "commit_every_steps": 20, "commit_every_seconds": 0.05},
)


@pytest.mark.slow
def test_killed_worker_and_killed_run(tmp_path: Path) -> None:
    """A worker killed with SIGKILL ends the run in one line (exit 3), committed prefix
    intact; SIGKILL of the run itself leaves no worker behind; the reruns resume exactly."""
    cfg = write_run(tmp_path, KILL_CONFIG, BUSY_MODEL)
    _sample(cfg, tmp_path / "ref.zarr")
    out = tmp_path / "k.zarr"

    # each worker makes about 8 calls per step: every run below crawls after about 150 steps
    # of its own, so it cannot end before the kill, however loaded the machine
    hold = held_env(tmp_path / "hold", after_calls=1200, pause=0.05)

    # 1. a worker is killed
    proc = popen_cli("sample", str(cfg), "--out", str(out), "--progress", "off",
                     "--workers", "2", env=hold)  # fmt: skip
    workers = _workers_of(proc.pid, 2)
    _wait_steps(out, 60)
    assert proc.poll() is None
    os.kill(workers[1], signal.SIGKILL)
    _, err = proc.communicate(timeout=PATIENCE)
    assert proc.returncode == 3, err
    line = _error_line(err)
    assert "worker process 1" in line and "killed by SIGKILL" in line, line
    done = chainyard.open_store(out).steps_done
    assert 60 <= done < 600
    ref = chainyard.open_store(tmp_path / "ref.zarr")
    assert np.array_equal(chainyard.open_store(out).draws(), ref.draws()[:done])
    assert not any(_alive(w) for w in workers)

    # 2. the run itself is killed: its workers end too
    proc = popen_cli("sample", str(cfg), "--out", str(out), "--progress", "off",
                     "--workers", "2", env=hold)  # fmt: skip
    workers = _workers_of(proc.pid, 2)
    _wait_steps(out, done + 40)
    assert proc.poll() is None
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=patient(30))
    # part of what is tested: the workers end with the run, not whenever they like; the
    # bound is generous for a loaded machine (see tests/patience.py)
    t0 = time.monotonic()
    while any(_alive(w) for w in workers) and time.monotonic() - t0 < patient(10):
        time.sleep(0.05)
    assert not any(_alive(w) for w in workers), "workers outlived the killed run"

    # 3. the rerun resumes exactly
    log = _sample(cfg, out, "--workers", "2")
    assert "resuming replica 0 at step" in log
    assert_same_store(out, tmp_path / "ref.zarr")


def test_sigterm_stops_the_pool_cleanly(tmp_path: Path) -> None:
    """SIGTERM: the finished steps are committed, exit 143, no worker left; resume exact."""
    cfg = write_run(tmp_path, KILL_CONFIG, BUSY_MODEL)
    out = tmp_path / "t.zarr"
    hold = held_env(tmp_path / "hold", after_calls=1200, pause=0.05)  # crawls after ~150 steps
    proc = popen_cli("sample", str(cfg), "--out", str(out), "--progress", "off",
                     "--workers", "2", env=hold)  # fmt: skip
    workers = _workers_of(proc.pid, 2)
    _wait_steps(out, 60)
    assert proc.poll() is None
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=PATIENCE)
    assert proc.returncode == 143, err
    assert "stopped by SIGTERM at step" in err
    assert not any(_alive(w) for w in workers)
    _sample(cfg, out, "--workers", "2")
    full = tmp_path / "full.zarr"
    _sample(cfg, full)
    assert_same_store(out, full)
