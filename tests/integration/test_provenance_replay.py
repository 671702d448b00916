"""`chainyard verify --replay`: rerunning recorded steps and comparing them bitwise."""

from __future__ import annotations

import json
import shutil
import time
from pathlib import Path

import numpy as np
import pytest

import chainyard
from chainyard.analysis import derive_store
from chainyard.errors import VerificationError
from chainyard.provenance.record import provenance_record
from chainyard.provenance.replay import replay
from chainyard.store import Store, chunk_checksum
from tests.conftest import HOLD_CODE, base_config, cli, held_env, popen_cli, write_run
from tests.patience import PATIENCE

BLOB_MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * float(np.dot(theta, theta)), float(theta[0] ** 2)
"""

#: vectorised, 2 ms a call (two calls a step); it can be held (HOLD_CODE)
SLOW_MODEL = HOLD_CODE + """
import time
import numpy as np

def log_prob(theta, data):
    time.sleep(0.002)
    hold()
    return -0.5 * np.sum(theta ** 2, axis=1)
"""


def _run(folder: Path, steps: int, model: str = BLOB_MODEL, *, slow: bool = False) -> Path:
    """Write a run folder: the blob model (or the slow vectorised one), chunks of 100 steps."""
    cfg = base_config(
        model={"log_prob": "model.py:log_prob", "data": "obs.csv", "vectorized": slow},
        sampler={"walkers": 16, "steps": steps, "blobs": [] if slow else ["sq"]},
        storage={"chunk_steps": 100, "fsync": False, "commit_every_steps": 50},
    )
    text = SLOW_MODEL if slow else model
    return write_run(folder, cfg, model=text, files={"obs.csv": "t,y\n0,1.0\n1,2.0\n"})


@pytest.fixture(scope="module")
def extended(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A store sampled to 200 steps, then extended to 300 (two segments)."""
    folder = tmp_path_factory.mktemp("extended")
    config = chainyard.load_config(_run(folder, 200))
    chainyard.sample(config, folder / "s.zarr", progress="off")
    chainyard.sample(config.with_steps(300), folder / "s.zarr", progress="off")
    return folder / "s.zarr"


def test_replay_first_steps_is_bitwise_identical(extended: Path) -> None:
    """--replay N reruns the first N steps from config, model and seed: identical, exit 0."""
    res = cli("verify", str(extended), "--replay", "150")
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip().splitlines()[-1] == (
        f"{extended}: replayed steps 0-149 from {extended.parent}: 150 stored row(s) bitwise "
        "identical"
    )


def test_replay_extension_segment(extended: Path) -> None:
    """Replaying segment 1 (the extension) from its recorded start state matches bitwise."""
    result = replay(extended, segment=1)
    assert (result.from_step, result.to_step, result.compared) == (200, 300, 100)
    assert result.ok


def test_replay_reports_first_difference(extended: Path, tmp_path: Path) -> None:
    """A store whose draws differ from what the recorded inputs produce: first step named."""
    store_path = Path(shutil.copytree(extended, tmp_path / "s.zarr"))
    store = Store.open(store_path, writable=True)
    rows = {name: store.read_rows(name, 100, 200) for name in store.array_names()}
    rows["position"][37, 3, 1] += 1e-12  # step 137, walker 3
    store.write_rows(100, rows, fsync=False)
    record = store.commit_record
    record["checksums"]["position"][1] = chunk_checksum(rows["position"])
    store.commit(record, fsync=False)  # properly committed: verify alone cannot tell
    res = cli("verify", str(store_path), "--replay", "250")
    assert res.returncode == 7
    (err,) = res.stderr.strip().splitlines()
    assert err.startswith(
        f"chainyard: error: {store_path}: replay of steps 0-249 differs first at step 137 in "
        "draws/position (walker 3: stored ["
    )


def test_replay_refuses_changed_model_before_importing_it(tmp_path: Path) -> None:
    """An edited model file makes replay fail clearly, and the edited model is never imported."""
    config = chainyard.load_config(_run(tmp_path, 100))
    chainyard.sample(config, tmp_path / "s.zarr", progress="off")
    marker = tmp_path / "imported.txt"
    (tmp_path / "model.py").write_text(f"open({str(marker)!r}, 'w')\n" + BLOB_MODEL)
    res = cli("verify", str(tmp_path / "s.zarr"), "--replay", "10")
    assert res.returncode == 7
    (err,) = res.stderr.strip().splitlines()
    assert err.startswith(
        f"chainyard: error: {tmp_path / 's.zarr'}: cannot replay: model or data no longer match "
        f"the recorded ones (looked in {tmp_path}): model file content (sha256 "
    )
    assert not marker.exists()


def test_replay_refuses_changed_data(tmp_path: Path) -> None:
    """An edited data file makes replay fail, naming the data file content."""
    config = chainyard.load_config(_run(tmp_path, 100))
    chainyard.sample(config, tmp_path / "s.zarr", progress="off")
    (tmp_path / "obs.csv").write_text("t,y\n0,1.5\n")
    with pytest.raises(VerificationError, match=r"data file content \(sha256 [0-9a-f]{12} -> "):
        replay(tmp_path / "s.zarr", 10)


def test_replay_thinned_store(extended: Path, tmp_path: Path) -> None:
    """A trimmed and thinned store replays: its rows inside the replayed steps all match."""
    trimmed = derive_store(Store.open(extended), tmp_path / "t.zarr", discard=20)
    thinned = derive_store(trimmed, tmp_path / "f.zarr", factor=3)
    result = replay(thinned.path, 120)
    assert result.ok
    assert result.compared == len(range(20, 120, 3))


def test_resume_after_sigterm_replays_exactly(tmp_path: Path) -> None:
    """A run stopped by SIGTERM and resumed records the resume; replaying it matches bitwise."""
    cfg = _run(tmp_path, 300, slow=True)
    hold = held_env(tmp_path / "hold", after_calls=200, pause=0.2)  # crawls after 100 steps
    first = popen_cli(
        "sample", str(cfg), "--out", "s.zarr", "--progress", "off", cwd=tmp_path, env=hold
    )
    deadline = time.monotonic() + PATIENCE
    commit = tmp_path / "s.zarr" / "commit.json"
    while not commit.exists() or json.loads(commit.read_text())["steps_done"] < 50:
        assert time.monotonic() < deadline and first.poll() is None
        time.sleep(0.02)
    first.terminate()
    assert first.wait(timeout=PATIENCE) == 143
    chainyard.sample(chainyard.load_config(cfg), tmp_path / "s.zarr", progress="off")
    record = provenance_record(tmp_path / "s.zarr")
    kinds = [s["kind"] for s in record["runs"][0]["segments"]]
    assert kinds == ["start", "resume"] and record["runs"][0]["resumed"] is True
    result = replay(tmp_path / "s.zarr", segment=1)
    assert result.ok and result.to_step == 300 and result.compared == 300 - result.from_step
    assert np.isfinite(Store.open(tmp_path / "s.zarr").draws()).all()
