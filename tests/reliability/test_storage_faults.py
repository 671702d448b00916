"""Storage faults: a full disk, a read-only file system and a file-size limit, for real.

Each case runs the real command line against a small size-limited tmpfs (mounted here; CI
runs as root) or under ``RLIMIT_FSIZE`` and asserts: the documented exit status (8 when the
file system refuses; 0 where nothing needs writing), exactly one ``chainyard: error:`` line
naming the path, no traceback, no temporary files left, committed data byte-identical
(``tally.assert_intact``); then, with the fault removed, the rerun completes bit-identically
to an uninterrupted run and ``chainyard verify`` exits 0.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import chainyard
from tests.conftest import write_run
from tests.reliability.conftest import snapshot
from tests.reliability.faults import (
    assert_one_error,
    assert_prefix_of,
    committed_files,
    fill,
    folder_for_test,
    fsize_limit,
    leftovers,
    read_only,
    rows,
    run,
    scratch,
    tmpfs,
)

pytestmark = pytest.mark.slow

STEPS = 3000
HALF = 1000


#: a vectorised Gaussian that takes ~0.3 ms per call (two calls per step), so that a run
#: lasts long enough for the commit helper process to take over before the fault
MODEL = """
import time
import numpy as np

def log_prob(theta, data):
    t = time.perf_counter()
    while time.perf_counter() - t < 3e-4:
        pass
    return -0.5 * np.einsum("ij,ij->i", theta, theta)
"""


def run_config(writer: str, commit_every_steps: int = 20) -> dict[str, Any]:
    """16 walkers, 3 parameters, chunks of 32 steps, a commit every 20 steps or 20 ms."""
    return {
        "model": {"log_prob": "model.py:log_prob", "vectorized": True},
        "parameters": [
            {"name": "a", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
            {"name": "b", "init": {"normal": {"loc": 1.0, "scale": 2.0}}},
            {"name": "c", "init": {"uniform": {"low": -1.0, "high": 1.0}}},
        ],
        "sampler": {"walkers": 16, "steps": STEPS},
        "storage": {
            "chunk_steps": 32,
            "commit_every_steps": commit_every_steps,
            "commit_every_seconds": 0.02,
            "commit_writer": writer,
        },
        "seed": 5,
    }


@pytest.fixture(scope="module")
def space(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """The module's scratch space: a tmpfs where permitted (see ``faults.scratch``)."""
    with scratch(tmp_path_factory.mktemp("faults")) as path:
        yield path


@pytest.fixture
def tmp_path(space: Path, request: pytest.FixtureRequest) -> Path:
    """A fresh folder for one test, inside the scratch space (shadows pytest's tmp_path)."""
    return folder_for_test(space, request)


@pytest.fixture(scope="module")
def work(space: Path) -> Path:
    """Configs, an uninterrupted verified reference run, a HALF-step store and their derive
    and pack outputs (in the scratch space, not on a fault mount)."""
    folder = space / "work"
    folder.mkdir()
    write_run(folder, run_config("thread"), MODEL, name="thread.yaml")
    write_run(folder, run_config("process"), MODEL, name="process.yaml")
    write_run(folder, run_config("process", 2000), MODEL, name="bigshm.yaml")
    for args in (
        ("sample", "thread.yaml", "--out", "ref.zarr", "--progress", "off"),
        ("verify", "ref.zarr"),
        ("sample", "thread.yaml", "--out", "half.zarr", "--steps", str(HALF), "--progress", "off"),
        ("derive", "--discard", "0", "ref.zarr", "--out", "derived.zarr"),
        ("pack", "ref.zarr", "--out", "ref.zip"),
    ):
        res = run(*args, cwd=folder)
        assert res.returncode == 0, f"{args}: {res.stdout}{res.stderr}"
    return folder


@pytest.fixture
def mnt(tmp_path: Path) -> Any:
    """A 2 MiB tmpfs for one test (unmounted after it)."""
    with tmpfs(tmp_path / "mnt", 2048) as path:
        yield path


def sample(work: Path, cfg: str, out: Path, *extra: str, **kw: Any) -> Any:
    return run("sample", cfg, "--out", str(out), "--progress", "off", *extra, cwd=work, **kw)


def assert_same_as_reference(store: Path, reference: Path) -> None:
    """Rows, start state, RNG state and chunk checksums bitwise equal to the reference."""
    got, ref = rows(store), rows(reference)
    for k in ref:
        assert np.array_equal(got[k], ref[k]), f"{store}: {k} differs from the reference"
    a, b = chainyard.open_store(store), chainyard.open_store(reference)
    assert a.commit_record["random_state"] == b.commit_record["random_state"]
    assert a.commit_record["checksums"] == b.commit_record["checksums"]


def assert_verified(target: Path, cwd: Path) -> None:
    """``chainyard verify TARGET`` exits 0."""
    res = run("verify", str(target), cwd=cwd)
    assert res.returncode == 0, f"verify {target}: exit {res.returncode}\n{res.stdout}{res.stderr}"


def rerun_completes(work: Path, cfg: str, out: Path) -> None:
    """With the fault gone, sampling completes bit-identically and verify exits 0."""
    res = sample(work, cfg, out)
    assert res.returncode == 0, res.stderr
    assert_same_as_reference(out, work / "ref.zarr")
    assert_verified(out, work)


# ------------------------------------------------------------------ disk full
def test_disk_full_at_store_creation(work: Path, mnt: Path, tally) -> None:
    """ENOSPC while the store is created: exit 8, one line naming the store, nothing left
    half-made; after space is freed the run completes bit-identically and verifies."""
    out = mnt / "s.zarr"
    filler = fill(mnt, 8 * 1024)
    res = sample(work, "thread.yaml", out)
    tally.fault()
    assert_one_error(res, 8, "s.zarr")
    assert not leftovers(mnt), leftovers(mnt)
    filler.unlink()
    rerun_completes(work, "thread.yaml", out)


@pytest.mark.parametrize(
    "writer",
    ["thread", "process"],
)
def test_disk_full_during_commits(writer: str, work: Path, mnt: Path, tally) -> None:
    """ENOSPC in the middle of extending a store (commits on the writer thread or in the
    helper process): exit 8, one line naming the store, no temporary files, every committed
    byte unchanged and the store verifies at its last commit; after space is freed the run
    completes bit-identically."""
    out = mnt / "s.zarr"
    shutil.copytree(work / "half.zarr", out)
    before = committed_files(out)
    filler = fill(mnt, 600 * 1024)  # ~1,500 more steps fit: the helper is running by then
    res = sample(work, f"{writer}.yaml", out)
    tally.fault()
    assert_one_error(res, 8, "s.zarr")
    assert not leftovers(mnt), leftovers(mnt)
    tally.assert_intact(before, out, "committed data after ENOSPC")
    assert assert_prefix_of(out, work / "ref.zarr") >= HALF
    assert_verified(out, work)
    filler.unlink()
    rerun_completes(work, f"{writer}.yaml", out)


def _words(command: str) -> list[str]:
    """The command words: derive keeps every step explicitly (no burn-in record here)."""
    return [command, "--discard", "0"] if command == "derive" else [command]


@pytest.mark.parametrize(
    "command",
    ["derive", "pack"],
)
def test_disk_full_during_derive_or_pack(command: str, work: Path, mnt: Path, tally) -> None:
    """ENOSPC while derive or pack writes its output: exit 8, one line naming the output,
    no output and no temporary files left, the source untouched; after space is freed the
    rerun writes a complete output that verifies."""
    src = work / "ref.zarr"
    before = snapshot(src)
    out = mnt / ("d.zarr" if command == "derive" else "p.zip")
    filler = fill(mnt, 96 * 1024)
    res = run(*_words(command), str(src), "--out", str(out), cwd=work)
    tally.fault()
    assert_one_error(res, 8, out.name)
    assert not out.exists(), f"{out} was left behind after ENOSPC"
    assert not leftovers(mnt), leftovers(mnt)
    tally.assert_intact(before, src, f"{command} source")
    filler.unlink()
    res = run(*_words(command), str(src), "--out", str(out), cwd=work)
    assert res.returncode == 0, res.stderr
    if command == "derive":
        got, ref = rows(out), rows(work / "derived.zarr")
        assert all(np.array_equal(got[k], ref[k]) for k in ref)
    assert_verified(out, work)


# ------------------------------------------------------------------ read-only
def test_read_only_complete_store(work: Path, mnt: Path, tally) -> None:
    """A complete store on a read-only file system: sample says there is nothing to do and
    exits 0 without writing; inspect, verify and diagnose read it and exit 0."""
    out = mnt / "s.zarr"
    shutil.copytree(work / "ref.zarr", out)
    before = snapshot(mnt)
    with read_only(mnt):
        res = sample(work, "thread.yaml", out)
        tally.fault()
        assert res.returncode == 0, res.stderr
        assert "nothing to do" in res.stderr, res.stderr
        assert "Traceback" not in res.stderr
        for args in (("inspect", str(out)), ("verify", str(out)), ("diagnose", "--raw", str(out))):
            res = run(*args, cwd=work)
            tally.fault()
            assert res.returncode == 0, f"{args[0]} on a read-only store: {res.stderr}"
            assert "Traceback" not in res.stderr, res.stderr
    tally.assert_intact(before, mnt, "read-only store")
    assert set(snapshot(mnt)) == set(before), "files appeared on the read-only mount"


def test_read_only_incomplete_store(work: Path, mnt: Path, tally) -> None:
    """An incomplete store on a read-only file system: exit 8, one line naming the store, no
    byte changed; remounted read-write, the run completes bit-identically and verifies."""
    out = mnt / "s.zarr"
    shutil.copytree(work / "half.zarr", out)
    before = snapshot(out)
    with read_only(mnt):
        res = sample(work, "thread.yaml", out)
        tally.fault()
        assert_one_error(res, 8, "s.zarr")
    tally.assert_intact(before, out, "read-only incomplete store")
    rerun_completes(work, "thread.yaml", out)


# ------------------------------------------------------------------ file-size limit
def _largest_file(path: Path) -> int:
    return max(p.stat().st_size for p in path.rglob("*") if p.is_file())


@pytest.mark.parametrize(
    "writer",
    ["thread", "process"],
)
def test_file_size_limit_during_sampling(writer: str, work: Path, tmp_path: Path, tally) -> None:
    """``ulimit -f`` just above the largest file of a half-done store: extending it hits
    EFBIG; the run (not killed by SIGXFSZ, commit helper or not) exits 8 with one line naming
    the store, keeps every committed byte and verifies; without the limit it completes."""
    out = tmp_path / "s.zarr"
    shutil.copytree(work / "half.zarr", out)
    before = committed_files(out)
    limit = _largest_file(out) + 2048
    res = sample(work, f"{writer}.yaml", out, preexec_fn=fsize_limit(limit))
    tally.fault()
    assert res.returncode != -25, "killed by SIGXFSZ: the engine must ignore it"
    assert_one_error(res, 8, "s.zarr")
    assert not leftovers(out), leftovers(out)
    tally.assert_intact(before, out, "committed data after EFBIG")
    assert assert_prefix_of(out, work / "ref.zarr") >= HALF
    assert_verified(out, work)
    rerun_completes(work, f"{writer}.yaml", out)


def test_file_size_limit_below_shared_memory(work: Path, tmp_path: Path, tally) -> None:
    """``ulimit -f`` above every store file but below the commit helper's shared memory
    (commits of up to 2,000 steps): the run falls back to committing on a thread and
    completes bit-identically (exit 0, no traceback)."""
    out = tmp_path / "s.zarr"
    limit = 256 * 1024  # every file of the finished store is far smaller (checked below)
    res = sample(work, "bigshm.yaml", out, preexec_fn=fsize_limit(limit))
    tally.fault()
    assert res.returncode == 0, f"exit {res.returncode}: {res.stderr}"
    assert "Traceback" not in res.stderr
    assert _largest_file(out) < limit
    shm = 16 * (3 + 2) * 8 * (32 + 2000)  # bytes per step x (chunk + pending) steps
    assert shm > limit, "the case must put the shared memory over the limit"
    assert_same_as_reference(out, work / "ref.zarr")
    assert_verified(out, work)


def test_tmpfs_is_really_limited(tmp_path: Path) -> None:
    """The fault file system itself: writing past its size fails with ENOSPC (so the cases
    above exercise a real full disk, not a simulated one)."""
    with tmpfs(tmp_path / "m", 64) as m:
        with pytest.raises(OSError) as info:
            (m / "big").write_bytes(b"\0" * (128 * 1024))
        assert info.value.errno == 28  # ENOSPC (Linux errno, common practice, no source)
        assert subprocess.run(["mountpoint", "-q", str(m)]).returncode == 0
    assert not os.path.ismount(tmp_path / "m")
