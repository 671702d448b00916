"""Storage faults at the store's own write sites: one StorageFaultError line, nothing left over.

Real faults, no mocks: a small tmpfs filled to the last block (ENOSPC), the same mount made
read-only (EROFS), and a file-size limit (RLIMIT_FSIZE with SIGXFSZ ignored, EFBIG) in a child
process. Each case checks the message (path, system error, last commit), that no temporary
file of the failed write remains, and that the committed files are byte-identical. The meaning
of each errno is POSIX's (common practice, no source).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import textwrap
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from chainyard.errors import StorageFaultError
from chainyard.store import Store
from tests.conftest import base_config, cli, write_run
from tests.reliability.conftest import Tally, snapshot

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="Linux mounts")


@pytest.fixture(scope="module")
def made(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A finished 300-step store (8 walkers, 2 parameters, chunks of 100 steps)."""
    root = tmp_path_factory.mktemp("faults")
    cfg = base_config(
        sampler={"walkers": 8, "steps": 300},
        storage={"chunk_steps": 100, "commit_writer": "thread"},
    )
    write_run(root, cfg)
    res = cli("sample", "run.yaml", "--out", "s.zarr", "--progress", "off", cwd=root)
    assert res.returncode == 0, res.stderr
    return root / "s.zarr"


@pytest.fixture
def small_fs(tmp_path: Path) -> Iterator[Path]:
    """A 512 KiB tmpfs (needs root; skipped with the reason otherwise)."""
    mnt = tmp_path / "fs"
    mnt.mkdir()
    if os.geteuid() != 0:
        pytest.skip("mounting a size-limited tmpfs needs root (CI runs as root)")
    res = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", "size=512k", "tmpfs", str(mnt)],
        capture_output=True,
        text=True,
    )
    if res.returncode:
        pytest.skip(f"cannot mount a tmpfs here: {res.stderr.strip()}")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", "-l", str(mnt)], check=False)


def fill(folder: Path) -> None:
    """Fill the file system of ``folder`` to the last byte."""
    fd = os.open(folder / "filler", os.O_WRONLY | os.O_CREAT, 0o644)
    try:
        for size in (1 << 16, 1 << 12, 1 << 8, 1):
            try:
                while True:
                    os.write(fd, b"\0" * size)
            except OSError:
                pass
    finally:
        os.close(fd)


def leftovers(store: Path) -> list[str]:
    """Temporary files of failed writes under ``store``."""
    return [str(p) for p in store.rglob("*") if p.name.endswith((".partial", ".tmp"))]


def rows(n: int) -> dict[str, np.ndarray]:
    """``n`` steps of incompressible rows for 8 walkers and 2 parameters."""
    rng = np.random.default_rng(5)
    return {
        "position": rng.standard_normal((n, 8, 2)),
        "log_prob": rng.standard_normal((n, 8)),
        "accepted": rng.random((n, 8)) < 0.5,
    }


def test_disk_full_at_every_write_site(made: Path, small_fs: Path, tally: Tally) -> None:
    """ENOSPC in chunk writes, the commit record and the attributes: one line each, the last
    commit intact, no temporary files."""
    store_path = small_fs / "s.zarr"
    shutil.copytree(made, store_path)
    store = Store.open(store_path, writable=True)
    store.ensure_capacity(600)
    before = snapshot(store_path)
    fill(small_fs)
    sites = {
        "chunk files": lambda: store.write_steps(rows(300), 300, 300, 600, fsync=True),
        "commit record": lambda: store.commit(store.commit_record, fsync=True),
        "attributes": lambda: store.update_attrs(note="x" * 20_000),
    }
    for site, write in sites.items():
        with pytest.raises(StorageFaultError) as err:
            write()
        tally.fault()
        msg = str(err.value)
        assert len(msg.splitlines()) == 1, site
        assert msg.startswith(str(store_path)), msg
        assert "(No space left on device [ENOSPC]); the last commit (step 300) is intact" in msg
        assert leftovers(store_path) == [], site
        tally.assert_intact(before, store_path, site)
    assert "note" not in store.attrs  # the attribute change was not kept in memory either
    os.unlink(small_fs / "filler")
    assert Store.open(store_path).steps_done == 300


def create_like(old: Store, path: Path, attrs: dict[str, object]) -> Store:
    """A new store at ``path`` shaped like ``old`` (8 walkers, 2 parameters) with ``attrs``."""
    return Store.create(
        path,
        attrs=attrs,
        walkers=8,
        n_params=2,
        blob_names=(),
        capacity=300,
        chunk_steps=100,
        codec="pcodec",
        level=None,
        start=old.start_state(),
        commit=old.commit_record,
        fsync=True,
    )


def test_disk_full_at_creation_removes_the_new_store(made: Path, small_fs: Path) -> None:
    """ENOSPC while a store is created: one line, and the half-made store is removed."""
    old = Store.open(made)
    fill(small_fs)
    with pytest.raises(StorageFaultError, match=r"\[ENOSPC\]\); nothing was committed"):
        create_like(old, small_fs / "new.zarr", old.attrs)
    assert not (small_fs / "new.zarr").exists()


def test_creation_fault_waits_for_the_writes_still_running(
    made: Path, small_fs: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A creation that fails while another of zarr's concurrent writes is still running: the
    store is removed only after that write ends, so it cannot come back as a stray folder.

    zarr writes an array's metadata and its parent group's metadata at once; on a loaded
    machine the group's write can start after the array's write failed and the store was
    removed, and it recreates the folder. The fault here is real (a full tmpfs with one page
    free for the root group's metadata); only the timing is forced, by delaying the group's
    write by 0.5 s in zarr's file writer.
    """
    import time

    import zarr.storage._local as local

    put = local._put

    def slow_group_put(path: Path, *args: object, **kwargs: object) -> int:
        if path.name == "zarr.json" and path.parent.name == "draws":
            time.sleep(0.5)
        return put(path, *args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(local, "_put", slow_group_put)
    old = Store.open(made)
    fill(small_fs)
    filler = small_fs / "filler"
    os.truncate(filler, filler.stat().st_size - 4096)  # one page for the root's metadata
    with pytest.raises(StorageFaultError, match=r"\[ENOSPC\]\); nothing was committed"):
        create_like(old, small_fs / "new.zarr", {"walkers": 8})
    time.sleep(1.0)  # longer than the delayed write
    assert sorted(p.name for p in small_fs.iterdir()) == ["filler"]


def test_read_only_mount(made: Path, small_fs: Path, tally: Tally) -> None:
    """EROFS: the chunk write fails with one line naming the chunk folder; nothing changes."""
    store_path = small_fs / "s.zarr"
    shutil.copytree(made, store_path)
    store = Store.open(store_path, writable=True)
    store.ensure_capacity(400)
    before = snapshot(store_path)
    subprocess.run(["mount", "-o", "remount,ro", str(small_fs)], check=True)
    with pytest.raises(StorageFaultError) as err:
        store.write_steps(rows(100), 300, 300, 400, fsync=False)
    tally.fault()
    assert "s.zarr/draws/position/c/3: the file system refused the write" in str(err.value)
    assert "[EROFS]); the last commit (step 300) is intact" in str(err.value)
    tally.assert_intact(before, store_path)


FSIZE_CHILD = textwrap.dedent(
    """
    import resource, signal, sys
    import numpy as np
    from chainyard.errors import StorageFaultError
    from chainyard.store import Store
    store = Store.open(sys.argv[1], writable=True)
    store.ensure_capacity(2300)
    signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    resource.setrlimit(resource.RLIMIT_FSIZE, (8000, 8000))
    rng = np.random.default_rng(5)
    rows = {"position": rng.standard_normal((2000, 8, 2)),
            "log_prob": rng.standard_normal((2000, 8)),
            "accepted": rng.random((2000, 8)) < 0.5}
    try:
        store.write_steps(rows, 300, 300, 2300, fsync=False)
    except StorageFaultError as exc:
        print(exc)
    """
)


def test_file_size_limit(made: Path, tmp_path: Path, tally: Tally) -> None:
    """EFBIG (ulimit -f) in a real child process: one line, no temporary file left."""
    store_path = tmp_path / "s.zarr"
    shutil.copytree(made, store_path)
    res = subprocess.run(
        [sys.executable, "-c", FSIZE_CHILD, str(store_path)], capture_output=True, text=True
    )
    tally.fault()
    assert res.returncode == 0, res.stderr
    line = res.stdout.strip()
    assert "[EFBIG]); the last commit (step 300) is intact" in line, res.stdout + res.stderr
    assert leftovers(store_path) == []
