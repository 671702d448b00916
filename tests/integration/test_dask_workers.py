"""``sample --workers dask://HOST:PORT`` against a real Dask LocalCluster with process workers.

The property checked is the project's own: the draws with Dask workers are bitwise those of a
serial run (each value comes from the same function on the same row), also when a worker is
killed mid-run (Dask runs its tasks again elsewhere) and when the whole cluster is lost and
the run is resumed serially. A model error on a worker reads as it does in a serial run.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.conftest import assert_same_store, base_config, cli, write_run
from tests.patience import PATIENCE

pytest.importorskip("distributed")

pytestmark = pytest.mark.slow

CLUSTER_SCRIPT = Path(__file__).with_name("dask_cluster.py")

#: about 0.2 ms per walker: a run of a few seconds, long enough to kill things mid-run
MODEL = """
import time
import numpy as np

def log_prob(theta, data):
    t = time.perf_counter()
    while time.perf_counter() - t < 2e-4:
        pass
    if theta[0] > 50.0:
        raise ValueError("theta escaped")
    return -0.5 * float(np.dot(theta, theta))
"""


class Cluster:
    """A LocalCluster in its own process group (address, worker pids, stop)."""

    def __init__(self) -> None:
        self.proc = subprocess.Popen(
            [sys.executable, str(CLUSTER_SCRIPT), "2"],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            text=True,
            start_new_session=True,
        )
        assert self.proc.stdout is not None
        self.address = self._line("ADDRESS")[0]
        self.workers = [int(p) for p in self._line("WORKERS")]

    def _line(self, tag: str) -> list[str]:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:  # waits as long as the cluster takes to start
            if line.startswith(tag + " "):
                return line.split()[1:]
        raise AssertionError(f"the Dask cluster ended before printing {tag}")

    @property
    def url(self) -> str:
        return "dask://" + self.address.split("://", 1)[1]

    def kill(self) -> None:
        if self.proc.poll() is None:
            os.killpg(self.proc.pid, signal.SIGKILL)
        self.proc.wait()


@pytest.fixture
def cluster() -> Iterator[Cluster]:
    c = Cluster()
    try:
        yield c
    finally:
        c.kill()


def _run(folder: Path, steps: int = 100) -> Path:
    config = base_config(
        storage={"chunk_steps": 50, "commit_every_steps": 25, "commit_every_seconds": 0.2}
    )
    config["sampler"] = {"walkers": 8, "steps": steps}
    return write_run(folder, config, model=MODEL)


def _wait_for_commit(store: Path, proc: subprocess.Popen[str]) -> None:
    deadline = time.monotonic() + PATIENCE  # a condition, not a speed limit
    while not (store / "commit.json").exists():
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, f"no commit within {PATIENCE:g} s"
        time.sleep(0.05)


def _popen(*args: str, env: dict[str, str] | None = None) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, "-m", "chainyard.cli", *args],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env={**os.environ, **(env or {})},
    )


def test_dask_workers_give_the_serial_draws(tmp_path: Path, cluster: Cluster) -> None:
    config = _run(tmp_path)
    serial = cli("sample", str(config), "--out", str(tmp_path / "serial.zarr"))
    assert serial.returncode == 0, serial.stderr
    pooled = cli(
        "sample", str(config), "--out", str(tmp_path / "dask.zarr"), "--workers", cluster.url
    )
    assert pooled.returncode == 0, pooled.stderr
    assert f"on the Dask cluster at {cluster.address} (2 workers)" in pooled.stderr + pooled.stdout
    assert_same_store(tmp_path / "serial.zarr", tmp_path / "dask.zarr")
    # dask:// alone: the address from DASK_SCHEDULER_ADDRESS; the worker setting is not part
    # of the run's identity, so the complete store is found complete (nothing resampled)
    again = cli(
        "sample",
        str(config),
        "--out",
        str(tmp_path / "dask.zarr"),
        "--workers",
        "dask://",
        env={"DASK_SCHEDULER_ADDRESS": cluster.address},
    )
    assert again.returncode == 0, again.stderr


def test_a_worker_killed_mid_run_changes_no_draw(tmp_path: Path, cluster: Cluster) -> None:
    config = _run(tmp_path, steps=150)
    out = tmp_path / "dask.zarr"
    proc = _popen("sample", str(config), "--out", str(out), "--workers", cluster.url)
    _wait_for_commit(out, proc)
    os.kill(cluster.workers[0], signal.SIGKILL)  # its tasks are run again on the other worker
    _, err = proc.communicate(timeout=PATIENCE)
    assert proc.returncode == 0, err
    assert cli("sample", str(config), "--out", str(tmp_path / "serial.zarr")).returncode == 0
    assert_same_store(tmp_path / "serial.zarr", out)


def test_a_lost_cluster_ends_in_one_line_and_resumes_exactly(
    tmp_path: Path, cluster: Cluster
) -> None:
    config = _run(tmp_path, steps=200)
    out = tmp_path / "dask.zarr"
    proc = _popen("sample", str(config), "--out", str(out), "--workers", cluster.url)
    _wait_for_commit(out, proc)
    cluster.kill()  # scheduler and workers at once
    _, err = proc.communicate(timeout=PATIENCE)
    assert proc.returncode == 3, err
    last = [line for line in err.splitlines() if line.startswith("chainyard: error:")]
    assert len(last) == 1 and "Dask" in last[0] and "Traceback" not in err, err
    resumed = cli("sample", str(config), "--out", str(out))  # serially, from the last commit
    assert resumed.returncode == 0, resumed.stderr
    assert cli("sample", str(config), "--out", str(tmp_path / "serial.zarr")).returncode == 0
    assert_same_store(tmp_path / "serial.zarr", out)


def test_a_model_error_on_a_worker_reads_as_in_a_serial_run(
    tmp_path: Path, cluster: Cluster
) -> None:
    config = base_config()
    config["sampler"] = {"walkers": 8, "steps": 50}
    config["parameters"] = [
        {"name": "x", "init": {"uniform": {"low": 60.0, "high": 70.0}}},
        {"name": "y", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
    ]
    path = write_run(tmp_path, config, model=MODEL)
    serial = cli("sample", str(path), "--out", str(tmp_path / "s.zarr"))
    pooled = cli("sample", str(path), "--out", str(tmp_path / "d.zarr"), "--workers", cluster.url)
    assert serial.returncode == pooled.returncode == 3
    line = [x for x in serial.stderr.splitlines() if x.startswith("chainyard: error:")]
    assert line and line[0] in pooled.stderr.replace(
        str(tmp_path / "d.zarr"), str(tmp_path / "s.zarr")
    )


def test_dask_without_an_address_is_one_line(tmp_path: Path) -> None:
    config = _run(tmp_path)
    env = {k: v for k, v in os.environ.items() if k != "DASK_SCHEDULER_ADDRESS"}
    proc = subprocess.run(
        [
            sys.executable,
            "-m",
            "chainyard.cli",
            "sample",
            str(config),
            "--out",
            str(tmp_path / "x.zarr"),
            "--workers",
            "dask://",
        ],
        capture_output=True,
        text=True,
        env=env,
        timeout=PATIENCE,
    )
    assert proc.returncode == 2, proc.stderr
    assert proc.stderr.strip().count("\n") == 0 and "DASK_SCHEDULER_ADDRESS" in proc.stderr
    assert not (tmp_path / "x.zarr").exists()
