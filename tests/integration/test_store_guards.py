"""Guards around a store: refusing changed settings, the single-writer lock, restart."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

import chainyard
from tests.conftest import GAUSS_MODEL, base_config, cli, popen_cli, tree_snapshot, write_run
from tests.patience import PATIENCE, patient


def _finished(tmp_path: Path, **changes: object) -> Path:
    cfg = base_config(
        model={"log_prob": "model.py:log_prob", "data": "obs.csv"},
        sampler={"walkers": 16, "steps": 300},
        **changes,
    )
    path = write_run(tmp_path, cfg, files={"obs.csv": "t,y\n0,1.0\n1,2.0\n"})
    res = cli("sample", str(path), "--out", "s.zarr", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    return path


def _refused(tmp_path: Path, cfg: Path) -> str:
    before = tree_snapshot(tmp_path / "s.zarr")
    res = cli("sample", str(cfg), "--out", "s.zarr", "--steps", "600", cwd=tmp_path)
    assert res.returncode == 5, res.stderr
    assert tree_snapshot(tmp_path / "s.zarr") == before
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1
    return lines[0]


def test_changed_model_file_refused(tmp_path: Path) -> None:
    """Editing the model file makes a resume refuse, naming the model file content."""
    cfg = _finished(tmp_path)
    (tmp_path / "model.py").write_text(GAUSS_MODEL + "\n# edited\n")
    line = _refused(tmp_path, cfg)
    assert "store was made with different settings: model file content (sha256 " in line
    assert "Use --restart" in line


def test_changed_data_refused(tmp_path: Path) -> None:
    """Editing the data file makes a resume refuse, naming the data file content."""
    cfg = _finished(tmp_path)
    (tmp_path / "obs.csv").write_text("t,y\n0,1.0\n1,2.5\n")
    line = _refused(tmp_path, cfg)
    assert "different settings: data file content (sha256 " in line


def test_changed_seed_refused(tmp_path: Path) -> None:
    """A different seed makes a resume refuse, naming the seed and both values."""
    cfg = _finished(tmp_path)
    cfg.write_text(cfg.read_text().replace("seed: 7", "seed: 8"))
    assert "different settings: seed (7 -> 8)." in _refused(tmp_path, cfg)


def test_changed_walkers_and_moves_refused(tmp_path: Path) -> None:
    """Walkers and moves are part of the identity; both differences are named."""
    cfg = _finished(tmp_path)
    text = cfg.read_text().replace("walkers: 16", "walkers: 20")
    text = text.replace("steps: 300", "steps: 300\n  moves:\n  - {kind: walk}")
    cfg.write_text(text)
    line = _refused(tmp_path, cfg)
    assert "sampler.walkers (16 -> 20)" in line and "sampler.moves" in line


def test_restart_discards(tmp_path: Path) -> None:
    """--restart discards a conflicting store and starts over with the new settings."""
    cfg = _finished(tmp_path)
    cfg.write_text(cfg.read_text().replace("seed: 7", "seed: 8"))
    res = cli("sample", str(cfg), "--out", "s.zarr", "--restart", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert chainyard.open_store(tmp_path / "s.zarr").attrs["seed"] == 8


def test_second_writer_gets_lock_error(tmp_path: Path) -> None:
    """While one process writes a store, a second one fails fast with a lock message."""
    cfg = base_config(sampler={"walkers": 16, "steps": 10_000_000})
    path = write_run(tmp_path, cfg)
    first = popen_cli("sample", str(path), "--out", "s.zarr", "--progress", "off", cwd=tmp_path)
    try:
        deadline = time.monotonic() + PATIENCE
        while not (tmp_path / "s.zarr" / "commit.json").exists():
            assert time.monotonic() < deadline
            time.sleep(0.05)
        # part of what is tested: the second writer fails fast instead of waiting for the
        # lock, which the first run (10 million steps) would hold for hours; the bound is
        # generous for a loaded machine (see tests/patience.py)
        res = cli("sample", str(path), "--out", "s.zarr", cwd=tmp_path, timeout=patient(60))
        assert res.returncode == 6
        assert res.stderr.strip() == (
            "chainyard: error: s.zarr: another process is writing this store (lock "
            f"{tmp_path.resolve()}/.s.zarr.lock is held); wait for it to finish or stop it"
        )
    finally:
        first.terminate()
        first.wait(timeout=PATIENCE)
    assert first.returncode == 143


def test_not_a_store_is_never_removed(tmp_path: Path) -> None:
    """--restart refuses to delete a folder that is not a chainyard store."""
    path = write_run(tmp_path)
    (tmp_path / "precious").mkdir()
    (tmp_path / "precious" / "thesis.tex").write_text("years of work")
    res = cli("sample", str(path), "--out", "precious", "--restart", cwd=tmp_path)
    assert res.returncode == 4
    assert (tmp_path / "precious" / "thesis.tex").read_text() == "years of work"


def test_replicas_are_independent(tmp_path: Path) -> None:
    """Replicas 0..3 use different streams: their walker-mean traces are uncorrelated.

    Common practice, no source: for independent chains of length n the sample correlation of
    two traces is about N(0, 1/n_eff); we allow |r| < 0.25 with n_eff ~ 2000/tau.
    """
    path = write_run(tmp_path, base_config(sampler={"walkers": 16, "steps": 2000}))
    traces = []
    for r in range(4):
        res = cli("sample", str(path), "--out", f"r{r}.zarr", "--replica", str(r), cwd=tmp_path)
        assert res.returncode == 0, res.stderr
        store = chainyard.open_store(tmp_path / f"r{r}.zarr")
        assert store.replica == r
        traces.append(store.draws()[:, :, 0].mean(axis=1))
    for i in range(4):
        for j in range(i + 1, 4):
            assert not np.array_equal(traces[i], traces[j])
            r_ij = np.corrcoef(traces[i], traces[j])[0, 1]
            assert abs(r_ij) < 0.25, (i, j, r_ij)
    starts = [
        chainyard.open_store(tmp_path / f"r{r}.zarr").start_state()["position"] for r in range(4)
    ]
    assert len({s.tobytes() for s in starts}) == 4
