"""The single-writer lock holds across every alias of one store, with two real processes.

One process holds the lock (a child that takes it and sleeps); a second ``chainyard sample``
reaches the same store through another path and must exit 6 with one line, leaving the
store untouched. The lock is an OS file lock (flock, Linux); aliases are resolved with
``os.path.realpath`` (common practice, no source).
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

import chainyard
from chainyard.errors import StoreConflictError
from chainyard.store import writer_lock
from tests.conftest import base_config, cli, write_run
from tests.patience import PATIENCE, patient
from tests.reliability.conftest import Tally, mounted, snapshot

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="flock on Linux")

HOLDER = textwrap.dedent(
    """
    import sys, time
    from chainyard.store import writer_lock
    with writer_lock(sys.argv[1]):
        print("held", flush=True)
        time.sleep(float(sys.argv[2]))  # held until killed: as long as any test may wait
    """
)


@pytest.fixture(scope="module")
def made(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder ``real/`` with a config and a finished 200-step store ``real/s.zarr``."""
    root = tmp_path_factory.mktemp("lock")
    cfg = base_config(sampler={"walkers": 8, "steps": 200})
    write_run(root / "real", cfg)
    res = cli("sample", "run.yaml", "--out", "s.zarr", "--progress", "off", cwd=root / "real")
    assert res.returncode == 0, res.stderr
    os.symlink(root / "real", root / "linkdir")
    os.symlink(root / "real" / "s.zarr", root / "link.zarr")
    (root / "real" / "sub").mkdir()
    return root


@pytest.fixture
def holder() -> Iterator[Callable[[str, Path], subprocess.Popen[str]]]:
    """Start a child process that takes the lock of a path and sleeps; killed afterwards."""
    procs: list[subprocess.Popen[str]] = []

    def start(path: str, cwd: Path) -> subprocess.Popen[str]:
        proc = subprocess.Popen(
            [sys.executable, "-c", HOLDER, path, str(PATIENCE)],
            cwd=cwd,
            stdout=subprocess.PIPE,
            text=True,
        )
        procs.append(proc)
        assert proc.stdout is not None and proc.stdout.readline().strip() == "held"
        return proc

    yield start
    for proc in procs:
        proc.kill()
        proc.wait(timeout=patient(30))


def second_writer(made: Path, out: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    """``chainyard sample`` asked to extend the held store to 400 steps through ``out``."""
    config = str(made / "real" / "run.yaml")
    return cli("sample", config, "--out", out, "--steps", "400", "--progress", "off", cwd=cwd)


# (holder's path, holder's cwd, writer's --out, writer's cwd), folders relative to the root
ALIASES = {
    "same path": ("s.zarr", "real", "s.zarr", "real"),
    "symlink to the store": ("real/s.zarr", ".", "link.zarr", "."),
    "store reached through its symlink, lock by the target": ("link.zarr", ".", "s.zarr", "real"),
    "symlink to the parent folder": ("real/s.zarr", ".", "linkdir/s.zarr", "."),
    "dot-dot path": ("s.zarr", "real", "sub/../s.zarr", "real"),
    "dot-dot through the symlinked parent": ("s.zarr", "real", "../../linkdir/s.zarr", "real/sub"),
    "relative against absolute": ("ABS", ".", "s.zarr", "real"),
}


@pytest.mark.slow
@pytest.mark.parametrize("case", list(ALIASES))
def test_alias_is_locked(case: str, made: Path, holder: Callable, tally: Tally) -> None:
    """A second writer reaching a held store through an alias exits 6 with one line."""
    hold, hold_cwd, out, cwd = ALIASES[case]
    hold = str(made / "real" / "s.zarr") if hold == "ABS" else hold
    before = snapshot(made / "real" / "s.zarr")
    holder(hold, made / hold_cwd)
    res = second_writer(made, out, made / cwd)
    tally.input()
    assert res.returncode == 6, res.stderr
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1, res.stderr
    assert lines[0] == (
        f"chainyard: error: {out}: another process is writing this store (lock "
        f"{(made / 'real').resolve()}/.s.zarr.lock is held); wait for it to finish or stop it"
    )
    tally.assert_intact(before, made / "real" / "s.zarr", case)


def test_lock_taken_once_and_released(tmp_path: Path) -> None:
    """``with writer_lock`` acquires once and releases on exit, even after an error."""
    store = tmp_path / "s.zarr"
    with writer_lock(store) as lock:
        assert lock.held and isinstance(lock.fd, int)
        # a second lock object, even in this process: refused
        with pytest.raises(chainyard.StoreLockedError), writer_lock(tmp_path / "." / "s.zarr"):
            pass
    assert not lock.held
    with pytest.raises(KeyError), writer_lock(store):
        raise KeyError("boom")
    with writer_lock(store) as again:  # free again after both exits
        assert again.held
    # another process can take it too (the kernel sees no holder)
    code = "from chainyard.store import writer_lock\nwith writer_lock('s.zarr'): pass"
    assert subprocess.run([sys.executable, "-c", code], cwd=tmp_path).returncode == 0


def test_inherited_descriptor_keeps_the_store_locked(tmp_path: Path) -> None:
    """A child inheriting ``lock.fd`` keeps the store locked after the parent releases."""
    store = tmp_path / "s.zarr"
    with writer_lock(store) as lock:
        assert lock.fd is not None
        child = subprocess.Popen(
            [sys.executable, "-c", f"print('ok', flush=True); import time; time.sleep({PATIENCE})"],
            pass_fds=[lock.fd],
            stdout=subprocess.PIPE,
            text=True,
        )
    try:
        assert child.stdout is not None and child.stdout.readline().strip() == "ok"
        with pytest.raises(chainyard.StoreLockedError), writer_lock(store):
            pass
    finally:
        child.kill()
        child.wait(timeout=patient(30))
    with writer_lock(store) as lock:  # the kernel dropped it with the child
        assert lock.held


@pytest.mark.slow
def test_starting_over_in_the_same_process(tmp_path: Path) -> None:
    """After a refused resume (different settings) the same process can restart the store."""
    cfg = base_config(sampler={"walkers": 8, "steps": 100}, storage={"commit_writer": "thread"})
    path = write_run(tmp_path, cfg)
    config = chainyard.load_config(path)
    chainyard.sample(config, tmp_path / "s.zarr", progress="off")
    changed = chainyard.load_config(write_run(tmp_path, {**cfg, "seed": 8}, name="changed.yaml"))
    with pytest.raises(StoreConflictError):
        chainyard.sample(changed, tmp_path / "s.zarr", progress="off")
    store = chainyard.sample(changed, tmp_path / "s.zarr", progress="off", restart=True)
    assert store.steps_done == 100 and store.attrs["seed"] == 8


@pytest.fixture(scope="module")
def bound(made: Path) -> Iterator[Path]:
    """``made/bound.zarr``: a bind mount of the store folder ``real/s.zarr`` (needs root)."""
    target = made / "bound.zarr"
    target.mkdir()
    with mounted(["--bind", str(made / "real" / "s.zarr")], target, "cannot bind-mount here"):
        yield target


# (holder's path, writer's --out), relative to the root: one folder reached by two mounts,
# which realpath cannot see (issue 18, item 12)
MOUNTS = {
    "writer through the bind mount": ("real/s.zarr", "bound.zarr"),
    "holder through the bind mount": ("bound.zarr", "real/s.zarr"),
}


@pytest.mark.parametrize("case", list(MOUNTS))
def test_bind_mount_alias_is_locked(
    case: str, made: Path, bound: Path, holder: Callable, tally: Tally
) -> None:
    """A second writer reaching a held store through a bind mount of its folder exits 6
    with one line naming the folder's lock, and the store is untouched."""
    hold, out = MOUNTS[case]
    assert os.stat(bound).st_ino == os.stat(made / "real" / "s.zarr").st_ino  # one folder
    before = snapshot(made / "real" / "s.zarr")
    holder(hold, made)
    res = second_writer(made, out, made)
    tally.input()
    assert res.returncode == 6, res.stderr
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1, res.stderr
    assert lines[0].startswith(f"chainyard: error: {out}: another process is writing this store")
    assert "locked, perhaps through another mount" in lines[0], lines[0]
    tally.assert_intact(before, made / "real" / "s.zarr", case)
