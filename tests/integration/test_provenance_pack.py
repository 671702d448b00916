"""`chainyard pack` / `unpack`: one-file archives of a store, read directly and round-tripped."""

from __future__ import annotations

import shutil
import zipfile
from pathlib import Path

import pytest

import chainyard
from chainyard.errors import StoreError
from chainyard.store import Store
from tests.conftest import assert_same_store, base_config, cli, tree_snapshot, write_run

BLOB_MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * float(np.dot(theta, theta)), float(theta[0] ** 2)
"""


@pytest.fixture(scope="module")
def run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A run folder with a sampled store, a burn-in record, a trimmed store and diagnostics."""
    folder = tmp_path_factory.mktemp("run")
    cfg = base_config(
        model={"log_prob": "model.py:log_prob", "data": "obs.csv"},
        sampler={"walkers": 16, "steps": 300, "blobs": ["sq"]},
        storage={"chunk_steps": 100, "fsync": False},
    )
    path = write_run(folder, cfg, model=BLOB_MODEL, files={"obs.csv": "t,y\n0,1.0\n1,2.0\n"})
    for args in (
        ("sample", str(path), "--out", "s.zarr", "--progress", "off"),
        ("decide", "burn-in", "s.zarr", "--out", "burn.json"),
        ("derive", "s.zarr", "--out", "t.zarr", "--burn-in-record", "burn.json"),
        ("diagnose", "t.zarr", "--json", "diagnostics.json"),
    ):
        res = cli(*args, cwd=folder)
        assert res.returncode == 0, res.stderr
    return folder


@pytest.fixture(scope="module")
def packed(run: Path) -> Path:
    """The trimmed store packed with its diagnostics record (via the CLI)."""
    res = cli("pack", "t.zarr", "--out", "t.zip", "--record", "diagnostics.json", cwd=run)
    assert res.returncode == 0, res.stderr
    assert res.stdout.startswith("t.zip: ") and " members; sha256 " in res.stdout
    return run / "t.zip"


def test_pack_unpack_round_trip_is_bit_identical(run: Path, packed: Path, tmp_path: Path) -> None:
    """Unpacking gives back every file of the store byte for byte, plus the pack/ extras."""
    res = cli("unpack", str(packed), "--out", str(tmp_path / "u.zarr"))
    assert res.returncode == 0, res.stderr
    unpacked = tree_snapshot(tmp_path / "u.zarr")
    store_files = {k: v for k, v in unpacked.items() if not k.startswith("pack/")}
    assert store_files == tree_snapshot(run / "t.zarr")
    assert_same_store(run / "t.zarr", tmp_path / "u.zarr")


def test_open_store_reads_the_pack_directly(run: Path, packed: Path) -> None:
    """open_store on the zip gives the same draws, bitwise, and the same metadata."""
    assert_same_store(run / "t.zarr", packed)
    pack, original = chainyard.open_store(packed), chainyard.open_store(run / "t.zarr")
    assert pack.packed and pack.attrs == original.attrs
    assert pack.column("x").tobytes() == original.column("x").tobytes()
    pack.close()


def test_pack_holds_draws_records_provenance_sources_and_config(packed: Path) -> None:
    """The archive holds the store, both records, provenance (two forms), model, data, config."""
    names = set(zipfile.ZipFile(packed).namelist())
    for name in (
        "zarr.json",
        "commit.json",
        "draws/position/c/0/0/0",
        "start/position/c/0/0",
        "pack/manifest.json",
        "pack/provenance.json",
        "pack/provenance.prov.json",
        "pack/config.json",
        "pack/sources/model.py",
        "pack/sources/obs.csv",
    ):
        assert name in names, name
    records = sorted(n for n in names if n.startswith("pack/records/"))
    assert [r.split("-", 1)[1] for r in records] == ["burn.json", "diagnostics.json"]


def test_pack_verifies_and_replays_without_the_original_files(
    run: Path, packed: Path, tmp_path: Path
) -> None:
    """A pack away from its run folder (model and data gone) verifies and replays from itself."""
    alone = tmp_path / "shared.zip"
    shutil.copy(packed, alone)
    away = [(run / n, tmp_path / n) for n in ("model.py", "obs.csv")]
    for src, dst in away:
        src.rename(dst)
    try:
        res = cli("verify", str(alone), "--replay", "120", "--run-pack-code", cwd=tmp_path)
    finally:
        for src, dst in away:
            dst.rename(src)
    assert res.returncode == 0, res.stderr
    assert "note    source store s.zarr: not found here" in res.stdout
    assert "ok      pack: " in res.stdout
    last = res.stdout.strip().splitlines()[-1]
    assert last.startswith(f"{alone}: replayed steps 0-119 from /tmp/")
    assert last.endswith("stored row(s) bitwise identical")


def test_unpack_refuses_a_corrupt_member(packed: Path, tmp_path: Path) -> None:
    """A pack whose chunk was altered is refused by unpack (exit 7) and fails verify."""
    bad = tmp_path / "bad.zip"
    with zipfile.ZipFile(packed) as src, zipfile.ZipFile(bad, "w") as dst:
        for info in src.infolist():
            data = src.read(info.filename)
            if info.filename == "draws/log_prob/c/1/0":
                data = data[:10] + bytes([data[10] ^ 1]) + data[11:]
            dst.writestr(info, data)
    res = cli("unpack", str(bad), "--out", str(tmp_path / "u"))
    assert res.returncode == 7
    assert res.stderr.strip() == (
        f"chainyard: error: {bad}: member draws/log_prob/c/1/0 differs from the manifest; "
        "not unpacking"
    )
    assert not (tmp_path / "u").exists()
    res = cli("verify", str(bad))
    assert res.returncode == 7
    assert "PROBLEM draws/log_prob chunk 1 (steps 100-199): " in res.stdout
    assert "PROBLEM pack member draws/log_prob/c/1/0: differs from the manifest" in res.stdout


def test_unpack_refuses_unsafe_names(packed: Path, tmp_path: Path) -> None:
    """A member that would land outside the target directory is refused."""
    bad = tmp_path / "evil.zip"
    shutil.copy(packed, bad)
    with zipfile.ZipFile(bad, "a") as z:
        z.writestr("../escaped.txt", "x")
    res = cli("unpack", str(bad), "--out", str(tmp_path / "u"))
    assert res.returncode == 4
    assert res.stderr.strip() == (
        f"chainyard: error: {bad}: member '../escaped.txt': name holds '..' (would land outside "
        "the target); not reading this pack"
    )
    assert not (tmp_path / "escaped.txt").exists()


def test_pack_refuses_a_tampered_store(run: Path, tmp_path: Path) -> None:
    """Packing a store that fails verification is refused with the first problem named."""
    store = Path(shutil.copytree(run / "s.zarr", tmp_path / "s.zarr"))
    (store / "draws/accepted/c/1/0").unlink()
    res = cli("pack", str(store), "--out", str(tmp_path / "s.zip"))
    assert res.returncode == 4  # a damaged store, as every reader says (was 7 before issue 18)
    assert res.stderr.strip() == (
        f"chainyard: error: {store}: fails verification (1 problem(s); first: draws/accepted "
        "chunk 1 (steps 100-199): chunk file missing); see `chainyard verify`"
    )
    assert not (tmp_path / "s.zip").exists()


def test_packed_store_is_read_only(packed: Path) -> None:
    """A packed store cannot be opened for writing (it must be unpacked first)."""
    with pytest.raises(StoreError, match="is a packed store \\(read-only\\); unpack it"):
        Store.open(packed, writable=True)


def test_pack_out_refuses_stores_folders_and_foreign_files(run: Path, tmp_path: Path) -> None:
    """pack --out inside a store, the store itself, an existing folder or a non-pack file:
    refused (exit 4, one line), nothing changed; an existing pack is replaced."""
    store = Path(shutil.copytree(run / "s.zarr", tmp_path / "s.zarr"))
    other = Path(shutil.copytree(run / "t.zarr", tmp_path / "t.zarr"))
    before = tree_snapshot(tmp_path)
    (tmp_path / "folder").mkdir()
    (tmp_path / "notes.txt").write_text("mine")
    cases = {
        str(store / "commit.json"): "is inside the store being packed",
        str(store): "is the store being packed",
        str(other / "draws/x.zip"): f"is inside the store {other}",
        str(tmp_path / "folder"): "is an existing folder",
        str(tmp_path / "notes.txt"): "exists and is not a chainyard pack",
    }
    for out, why in cases.items():
        res = cli("pack", str(store), "--out", out)
        assert res.returncode == 4, res.stderr
        assert res.stderr.strip().startswith(f"chainyard: error: {out}: {why}"), res.stderr
        assert len(res.stderr.strip().splitlines()) == 1
    assert (tmp_path / "notes.txt").read_text() == "mine"
    after = tree_snapshot(tmp_path)
    assert {k: v for k, v in after.items() if k in before} == before
    first = cli("pack", str(store), "--out", str(tmp_path / "p.zip"))
    assert first.returncode == 0, first.stderr
    again = cli("pack", str(store), "--out", str(tmp_path / "p.zip"))
    assert again.returncode == 0, again.stderr  # an existing pack is replaced
    assert not list(tmp_path.glob(".p.zip.*.tmp"))
