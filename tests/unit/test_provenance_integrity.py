"""Pure parts of integrity and provenance: hashes, the seal, completeness, names."""

from __future__ import annotations

import hashlib
import json

import numpy as np

from chainyard.provenance.checks import steps_label
from chainyard.provenance.pack import _member_for
from chainyard.provenance.record import REQUIRED_FIELDS, missing_fields
from chainyard.store.integrity import (
    bytes_checksum,
    canonical_sha256,
    chunk_checksum,
    keyed_hashes,
    self_hash,
)
from chainyard.store.packed import name_problem


def test_canonical_hash_ignores_key_order_and_spacing() -> None:
    """The canonical SHA-256 is that of sorted-key, space-free JSON (the config_hash rule)."""
    a = {"b": [1, 2.5], "a": {"y": None, "x": "s"}}
    b = json.loads(json.dumps(a, indent=4, sort_keys=False))
    text = '{"a":{"x":"s","y":null},"b":[1,2.5]}'
    assert canonical_sha256(a) == canonical_sha256(b) == hashlib.sha256(text.encode()).hexdigest()


def test_keyed_hashes_name_the_changed_key() -> None:
    """Hashing each key separately tells exactly which key changed."""
    before = keyed_hashes({"seed": 7, "walkers": 16, "integrity": {}}, exclude=("integrity",))
    after = keyed_hashes({"seed": 8, "walkers": 16})
    assert set(before) == {"seed", "walkers"}
    assert [k for k in before if before[k] != after[k]] == ["seed"]


def test_self_hash_covers_every_other_entry() -> None:
    """The block's own hash changes when any entry changes, and ignores the old self entry."""
    block = {"files": {"position": ["a"]}, "attrs": {}, "self": "old"}
    h = self_hash(block)
    assert h == self_hash({**block, "self": "other"})
    assert h != self_hash({**block, "files": {"position": ["b"]}})


def test_checksums_are_blake2b_128() -> None:
    """Chunk checksums are 128-bit BLAKE2b: of raw bytes, and of (dtype, shape, values)."""
    assert bytes_checksum(b"abc") == hashlib.blake2b(b"abc", digest_size=16).hexdigest()
    rows = np.arange(6, dtype=np.float64).reshape(2, 3)
    assert chunk_checksum(rows) != chunk_checksum(rows.reshape(3, 2))
    assert len(chunk_checksum(rows)) == 32


def test_steps_label_is_inclusive_and_zero_based() -> None:
    """Rows [3000, 4000) are shown as steps 3000-3999; a single row as one step."""
    assert steps_label(3000, 4000) == "steps 3000-3999"
    assert steps_label(7, 8) == "step 7"


def _complete() -> dict:
    run = {
        "config": {"model": {"data": "d.csv"}},
        "config_sha256": "c",
        "sources": [{"role": "model", "sha256": "m"}, {"role": "data", "sha256": "d"}],
        "seed": 1,
        "replica": 0,
        "spawn_keys": {"sampler": [0, 1]},
        "git": None,
        "started_utc": "t0",
        "ended_utc": "t1",
        "segments": [],
    }
    software = dict.fromkeys(("chainyard", "python", "numpy", "emcee", "zarr"), "1")
    return {
        "subject": {"path": "p", "sha256": "s"},
        "generated_by": {"software": software, "platform": {"platform": "x"}, "git": None},
        "times": {"started_utc": "t0", "ended_utc": "t1"},
        "runs": [run],
        "inputs": [{"path": "d.csv", "sha256": "d"}],
    }


def test_missing_fields_on_a_synthetic_record() -> None:
    """A complete record has nothing missing; null git is allowed, a null seed is not."""
    rec = _complete()
    assert missing_fields(rec) == []
    rec["runs"][0]["seed"] = None
    rec["runs"][0]["sources"] = [{"role": "model", "sha256": "m"}]
    assert missing_fields(rec) == ["runs[0].sources.data", "runs[0].seed"]
    assert len(REQUIRED_FIELDS) == len(set(REQUIRED_FIELDS))


def test_data_hash_required_only_when_data_is_configured() -> None:
    """A run without a data file needs no data hash."""
    rec = _complete()
    rec["runs"][0]["config"]["model"]["data"] = None
    rec["runs"][0]["sources"] = [{"role": "model", "sha256": "m"}]
    assert missing_fields(rec) == []
    rec["runs"] = []
    assert missing_fields(rec)[0] == "runs"


def test_pack_member_names_are_safe() -> None:
    """Unsafe zip member names are refused; recorded source paths map to safe members."""
    for bad in ("../x", "/etc/passwd", "a/../../b", "c:\\x", "a\\b", ""):
        assert name_problem(bad) is not None, bad
    assert name_problem("draws/position/c/0/0/0") is None
    assert name_problem("pack/sources/__up__/m.py") is None
    assert _member_for("../shared/m.py") == "pack/sources/__up__/shared/m.py"
    assert _member_for("./model.py") == "pack/sources/model.py"
    assert name_problem(_member_for("/abs/data.csv")) is None


def test_chunk_keys_from_metadata() -> None:
    """Chunk keys built from zarr.json follow zarr v3's default and v2 key encodings."""
    from chainyard.store.integrity import chunk_key_from_metadata

    default = {"shape": [250, 16, 2], "chunk_key_encoding": {"name": "default"}}
    assert chunk_key_from_metadata("draws/position", default, 3) == "draws/position/c/3/0/0"
    v2 = {"shape": [250, 16], "chunk_key_encoding": {"name": "v2"}}
    assert chunk_key_from_metadata("draws/log_prob", v2, 2) == "draws/log_prob/2.0"
