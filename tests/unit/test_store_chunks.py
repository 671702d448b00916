"""The direct chunk writer produces exactly the bytes zarr itself stores.

Reference: zarr 3 (the library that reads every store) writing the same values into an
array with the same codec settings; the comparison is byte for byte on the chunk files, and
the values read back through zarr are compared with np.array_equal.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import zarr

import chainyard
from chainyard.store.chunks import chunk_encoder, write_chunk_file
from chainyard.store.layout import codec_kwargs
from tests.conftest import base_config, write_run

CODECS = ["none", "zstd", "pcodec", "blosc_zstd", "lz4"]
CHUNK = 50


def _values(dtype: str, shape: tuple[int, ...], seed: int = 3) -> np.ndarray:
    rng = np.random.default_rng(seed)
    if dtype == "bool":
        return rng.random(shape) < 0.4
    x = rng.standard_normal(shape)
    x[1::3] = x[::3][: len(x[1::3])]  # repeated rows, as rejected proposals leave them
    return x


def _array(root: Path, name: str, codec: str, dtype: str, shape: tuple[int, ...]) -> zarr.Array:
    group = zarr.open_group(root, mode="a")
    return group.create_array(
        name,
        shape=shape,
        chunks=(CHUNK, *shape[1:]),
        dtype=dtype,
        fill_value=False if dtype == "bool" else np.nan,
        **codec_kwargs(codec, None, dtype),
    )


def _meta(root: Path, name: str) -> dict:
    return json.loads((root / name / "zarr.json").read_text())


@pytest.mark.parametrize("codec", CODECS)
@pytest.mark.parametrize(
    ("dtype", "trailing"), [("float64", (8, 3)), ("float64", (8,)), ("bool", (8,))]
)
@pytest.mark.parametrize("rows", [CHUNK, 17])  # a full chunk, and a chunk that is partly filled
def test_bytes_equal_zarr(tmp_path: Path, codec: str, dtype: str, trailing: tuple, rows: int):
    shape = (3 * CHUNK, *trailing)
    values = _values(dtype, (rows, *trailing))
    arr = _array(tmp_path, "ref", codec, dtype, shape)
    arr[CHUNK : CHUNK + rows] = values  # chunk 1, through zarr
    key = "c/" + "/".join(["1"] + ["0"] * len(trailing))
    expected = (tmp_path / "ref" / key).read_bytes()

    enc = chunk_encoder(_meta(tmp_path, "ref"))
    assert enc is not None, f"{codec}/{dtype}: no direct encoder"
    got = enc.encode(values)
    assert got == expected

    # written into a second, identical array, zarr reads back the same values
    other = _array(tmp_path, "direct", codec, dtype, shape)
    write_chunk_file(tmp_path / "direct" / key, got, fsync=True)
    back = np.asarray(other[CHUNK : CHUNK + rows])
    assert back.dtype == values.dtype and np.array_equal(back, values)
    rest = np.asarray(other[CHUNK + rows : 2 * CHUNK])
    assert (not rest.any()) if dtype == "bool" else np.isnan(rest).all()


def test_unknown_codec_chain_falls_back(tmp_path: Path):
    arr = zarr.open_group(tmp_path, mode="a").create_array(
        "gz", shape=(10, 2), chunks=(5, 2), dtype="float64", compressors=[zarr.codecs.GzipCodec()]
    )
    assert arr is not None
    assert chunk_encoder(_meta(tmp_path, "gz")) is None


def test_no_partial_files_left(tmp_path: Path):
    path = tmp_path / "c" / "0"
    write_chunk_file(path, b"abc", fsync=False)
    write_chunk_file(path, b"defg", fsync=True)
    assert path.read_bytes() == b"defg"
    assert sorted(p.name for p in path.parent.iterdir()) == ["0"]


BLOB_MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * float(theta @ theta), float(theta[0])
"""


@pytest.mark.parametrize("codec", CODECS)
def test_sampled_store_chunks_equal_zarr_rewrite(tmp_path: Path, codec: str):
    """A sampled store's chunk files equal what zarr writes for the same committed rows.

    Commits every 40 steps with 50-step chunks, so chunks are written partly and then
    rewritten whole, as a wall-time commit or a resume does.
    """
    cfg = base_config(
        sampler={"walkers": 8, "steps": 130, "blobs": ["first"]},
        storage={"chunk_steps": CHUNK, "codec": codec, "commit_every_steps": 40},
    )
    path = write_run(tmp_path, cfg, BLOB_MODEL)
    store = chainyard.sample(chainyard.load_config(path), tmp_path / "s.zarr", progress="off")
    for name in store.array_names():
        node = f"draws/{name}"
        meta = _meta(store.path, node)
        values = store.read_rows(name, 0, store.steps_done)
        ref = _array(tmp_path / "ref.zarr", name, codec, meta["data_type"], tuple(meta["shape"]))
        ref[: len(values)] = values
        for ci in range(-(-store.steps_done // CHUNK)):
            key = store.chunk_key(name, ci)
            ours = (store.path / key).read_bytes()
            theirs = (tmp_path / "ref.zarr" / name / key[len(node) + 1 :]).read_bytes()
            assert ours == theirs, f"{codec}: {key} differs from zarr's encoding"


def test_failed_write_leaves_no_partial_file(tmp_path: Path):
    """A chunk write that fails (the target is a non-empty folder: rename refused) removes its
    temporary file and re-raises the OSError naming the chunk (common practice, no source)."""
    target = tmp_path / "c" / "0"
    (target / "inner").mkdir(parents=True)
    with pytest.raises(OSError) as err:
        write_chunk_file(target, b"x" * 1000, fsync=True)
    assert list((tmp_path / "c").iterdir()) == [target]
    assert err.value.filename is not None
