"""`chainyard verify`: real byte flips, truncations, deletions and edits on stores on disk."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

import chainyard
from chainyard.analysis import derive_store
from chainyard.provenance.verify import verify
from chainyard.store import Store
from tests.conftest import base_config, cli, write_run

BLOB_MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * float(np.dot(theta, theta)), float(theta[0] ** 2)
"""

#: chunk file of each array kind, and what verify must call it (chunk_steps 100, 250 steps)
CHUNKS = {
    "draws/position/c/1/0/0": "draws/position chunk 1 (steps 100-199)",
    "draws/log_prob/c/0/0": "draws/log_prob chunk 0 (steps 0-99)",
    "draws/accepted/c/2/0": "draws/accepted chunk 2 (steps 200-249)",
    "draws/blob/sq/c/1/0": "draws/blob/sq chunk 1 (steps 100-199)",
    "start/position/c/0/0": "start/position chunk 0 (state before step 0)",
    "start/log_prob/c/0": "start/log_prob chunk 0 (state before step 0)",
    "start/blob/sq/c/0": "start/blob/sq chunk 0 (state before step 0)",
}


def make_store(folder: Path, steps: int = 250, name: str = "s.zarr") -> Path:
    """Sample a small store with a blob and a data file; chunks of 100 steps."""
    cfg = base_config(
        model={"log_prob": "model.py:log_prob", "data": "obs.csv"},
        sampler={"walkers": 16, "steps": steps, "blobs": ["sq"]},
        storage={"chunk_steps": 100, "fsync": False},
    )
    path = write_run(folder, cfg, model=BLOB_MODEL, files={"obs.csv": "t,y\n0,1.0\n1,2.0\n"})
    chainyard.sample(chainyard.load_config(path), folder / name, progress="off")
    return folder / name


@pytest.fixture(scope="module")
def pristine(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One sampled store shared by the tests (each test tampers with its own copy)."""
    return make_store(tmp_path_factory.mktemp("pristine"))


@pytest.fixture
def store(pristine: Path, tmp_path: Path) -> Path:
    """A private copy of the pristine store."""
    return Path(shutil.copytree(pristine, tmp_path / "s.zarr"))


def flip(path: Path, pos: int) -> None:
    """Flip the lowest bit of byte ``pos`` of a file, in place."""
    data = bytearray(path.read_bytes())
    data[pos] ^= 0x01
    path.write_bytes(bytes(data))


def problems(store: Path) -> list[str]:
    """The problem lines verify reports for a store."""
    return [str(f) for f in verify(store).problems]


def edit_json(path: Path, change: object) -> None:
    """Rewrite a JSON file after ``change(document)`` edited it."""
    doc = json.loads(path.read_text())
    change(doc)  # type: ignore[operator]
    path.write_text(json.dumps(doc, indent=2))


def test_intact_store_verifies_via_cli(store: Path) -> None:
    """An untouched store passes: exit 0, every chunk checked, nothing on stderr."""
    res = cli("verify", str(store))
    assert res.returncode == 0, res.stderr
    assert res.stderr == ""
    assert res.stdout.strip().splitlines()[-1] == f"{store}: verified (store, 12 chunk(s) checked)"
    assert "PROBLEM" not in res.stdout


@pytest.mark.parametrize("chunk", sorted(CHUNKS))
def test_byte_flip_in_every_array_kind_is_named(store: Path, chunk: str) -> None:
    """A flipped byte in the middle of any array's chunk fails verify, naming that chunk only."""
    path = store / chunk
    flip(path, len(path.read_bytes()) // 2)
    found = problems(store)
    assert len(found) == 1, found
    assert found[0].startswith(CHUNKS[chunk] + ": "), found


def test_byte_flip_anywhere_in_a_chunk_is_found(store: Path) -> None:
    """Every byte position of a pcodec chunk matters, including header bytes that decode equal.

    Measured here: flipping bytes 7, 8 or 10 of a pcodec chunk leaves the decoded values
    unchanged, so only the stored-bytes checksum can find those flips.
    """
    path = store / "draws/position/c/1/0/0"
    original = path.read_bytes()
    positions = sorted({0, 7, 8, 10, 16, *range(0, len(original), max(1, len(original) // 25))})
    for pos in positions:
        flip(path, pos)
        found = problems(store)
        assert [p.split(":")[0] for p in found] == ["draws/position chunk 1 (steps 100-199)"], pos
        path.write_bytes(original)
    assert problems(store) == []


def test_header_flip_that_decodes_equal_is_a_stored_bytes_mismatch(store: Path) -> None:
    """A flip the codec ignores is reported as a stored-bytes mismatch (values still match)."""
    flip(store / "draws/position/c/1/0/0", 7)
    assert problems(store) == [
        "draws/position chunk 1 (steps 100-199): checksum mismatch of the stored bytes "
        "(decoded values still match)"
    ]


def test_truncated_chunk_is_corrupt(store: Path) -> None:
    """A chunk cut in half cannot be decoded: reported as a corrupt chunk, verify does not crash."""
    path = store / "draws/log_prob/c/1/0"
    path.write_bytes(path.read_bytes()[: len(path.read_bytes()) // 2])
    (line,) = problems(store)
    assert line.startswith("draws/log_prob chunk 1 (steps 100-199): corrupt chunk: cannot decode (")


def test_deleted_chunk_is_missing(store: Path) -> None:
    """A deleted chunk file is named as missing (zarr would silently read fill values)."""
    (store / "draws/position/c/2/0/0").unlink()
    assert problems(store) == ["draws/position chunk 2 (steps 200-249): chunk file missing"]


def test_edited_attrs_are_named(store: Path) -> None:
    """Editing the seed in zarr.json breaks the seal and the identity, both named."""
    edit_json(store / "zarr.json", lambda d: d["attributes"]["chainyard"].update(seed=8))
    found = problems(store)
    assert "zarr.json: attribute chainyard 'seed' was edited since the commit" in found
    assert "zarr.json attributes: seed is 8, expected 7" in found


def test_edited_provenance_is_named(store: Path) -> None:
    """Editing the recorded host or the segment history is found and named."""
    edit_json(
        store / "zarr.json",
        lambda d: d["attributes"]["chainyard"]["provenance"]["host"].update(host="elsewhere"),
    )
    edit_json(store / "commit.json", lambda d: d["segments"][0].update(host="elsewhere"))
    assert problems(store) == [
        "commit.json: field 'segments' was edited since the commit",
        "zarr.json: attribute chainyard 'provenance' was edited since the commit",
    ]


def test_edited_counter_is_named(store: Path) -> None:
    """Lowering steps_done in commit.json is found by the seal, the counters and the history."""
    edit_json(store / "commit.json", lambda d: d.update(steps_done=200))
    found = problems(store)
    assert "commit.json: field 'steps_done' was edited since the commit" in found
    assert "commit.json checksums position: 3 recorded, 2 chunks committed" in found
    assert "commit.json segments: history ends at step 250 but steps_done is 200" in found


def test_edited_integrity_block_is_named(store: Path) -> None:
    """Rewriting a recorded chunk checksum is caught by the integrity block's own hash."""
    edit_json(
        store / "commit.json", lambda d: d["integrity"]["files"]["position"].__setitem__(0, "0")
    )
    found = problems(store)
    assert "commit.json: the integrity block was edited (its SHA-256 differs)" in found
    assert (
        "draws/position chunk 0 (steps 0-99): checksum mismatch of the stored bytes "
        in (found[-1][:78])
    )


def test_cli_reports_problems_and_exits_7(store: Path) -> None:
    """The CLI prints one PROBLEM line per chunk, one error line on stderr, and exits 7."""
    flip(store / "draws/accepted/c/0/0", 20)
    (store / "draws/blob/sq/c/2/0").unlink()
    res = cli("verify", str(store))
    assert res.returncode == 7
    lines = [ln for ln in res.stdout.splitlines() if ln.startswith("PROBLEM")]
    assert [ln.split(":")[0] for ln in lines] == [
        "PROBLEM draws/accepted chunk 0 (steps 0-99)",
        "PROBLEM draws/blob/sq chunk 2 (steps 200-249)",
    ]
    (err,) = res.stderr.strip().splitlines()
    assert err.startswith(f"chainyard: error: {store}: verification failed: draws/accepted chunk 0")
    assert err.endswith("(and 1 more)")
    assert "Traceback" not in res.stderr


def test_cli_json_report(store: Path) -> None:
    """--json prints a machine-readable report with each problem's location."""
    flip(store / "draws/log_prob/c/2/0", 30)
    res = cli("verify", str(store), "--json")
    assert res.returncode == 7
    report = json.loads(res.stdout)["verify"]
    assert report["ok"] is False
    assert [p["where"] for p in report["problems"]] == ["draws/log_prob chunk 2 (steps 200-249)"]


def test_verify_never_imports_the_model(tmp_path: Path) -> None:
    """Verify reads the store only: a model that leaves a mark when imported is never imported."""
    store = make_store(tmp_path)
    marker = tmp_path / "imported.txt"
    (tmp_path / "model.py").write_text(
        f"open({str(marker)!r}, 'w').write('imported')\n" + BLOB_MODEL
    )
    res = cli("verify", str(store))
    assert res.returncode == 0, res.stderr
    assert not marker.exists()
    assert "note    input " in res.stdout and "changed since it was used" in res.stdout


def test_rows_past_the_commit_are_not_a_problem(store: Path) -> None:
    """Rows an interrupted run wrote past steps_done change the last chunk's bytes: a note only."""
    s = Store.open(store, writable=True)
    rows = {name: s.read_rows(name, 240, 250) for name in s.array_names()}
    s.ensure_capacity(300)
    s.write_rows(250, rows, fsync=False)  # written, never committed
    report = verify(store)
    assert report.ok, report.lines()
    notes = [str(f) for f in report.findings if f.level == "note"]
    assert any(
        n.startswith("draws/position chunk 2 (steps 200-249): stored bytes differ but")
        for n in notes
    )


def test_changed_source_of_derived_store_breaks_the_chain(tmp_path: Path) -> None:
    """A trimmed store whose source was extended afterwards fails verify, naming the source."""
    source = make_store(tmp_path)
    derived = derive_store(Store.open(source), tmp_path / "t.zarr", discard=50)
    assert verify(derived.path).ok
    config = chainyard.load_config(tmp_path / "run.yaml").with_steps(300)
    chainyard.sample(config, source, progress="off")
    (line,) = [str(p) for p in verify(derived.path).problems]
    assert line.startswith(f"source store {source}: changed since it was used (sha256 recorded ")
    assert verify(derived.path, chain=False).ok


def test_record_with_changed_input_fails(tmp_path: Path) -> None:
    """A decision record whose input store changed since it was written fails verify."""
    source = make_store(tmp_path)
    res = cli("decide", "burn-in", str(source), "--out", str(tmp_path / "burn.json"))
    assert res.returncode == 0, res.stderr
    assert verify(tmp_path / "burn.json").ok
    edit_json(source / "commit.json", lambda d: d.update(updated_utc="2000-01-01T00:00:00Z"))
    (line,) = [str(p) for p in verify(tmp_path / "burn.json").problems]
    assert line.startswith(f"input store {source}: changed since it was used")
