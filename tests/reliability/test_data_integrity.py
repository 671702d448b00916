"""Data integrity of what readers read (issue 18, items 1, 2, 3, 9 and the verify/pack half of 17).

Real stores made by ``chainyard sample`` (8 walkers, 2 parameters, 300 steps, chunks of 100
steps) with each storage codec are damaged the way the outside trial did, and every command
that reads them runs as a real child process (:func:`run_batch`, peak RSS by ``wait4``):

* **decodable damage** (a flipped byte in a raw chunk, two chunks swapped, ``steps_done``
  edited upward): every reader (diagnose, summarise, export, plot, decide, derive, pack)
  refuses with exit 4 in one line naming the array, chunk and steps (or the edited field);
  verify exits 7; nothing is written and the store keeps its bytes;
* **decompression bombs** (a chunk replaced by a zstd frame expanding to 1 GiB, declaring its
  size or not; blosc, pcodec and gzip streams holding 64 MiB; the seal recomputed, so only
  the decoding bound stands between the bomb and memory), also from a pack: exit 4 (verify
  7) and a peak RSS within 48 MiB (RSS_SLACK_MIB) of the same command on the intact store;
* **symbolic links and unknown files** inside a store: verify lists them (exit 7), pack
  refuses (exit 4) and writes nothing.
"""

from __future__ import annotations

import gzip
import json
import os
import shutil
import struct
import zipfile
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from chainyard.store.integrity import (
    bytes_checksum,
    canonical_sha256,
    keyed_hashes,
    metadata_without_shape,
    self_hash,
)
from tests.conftest import base_config, cli, write_run
from tests.reliability.conftest import Tally, snapshot
from tests.reliability.test_untrusted_input import Job, Run, _members, craft, run_batch

POS = "draws/position"
LP = "draws/log_prob"
CHUNK_BYTES = 100 * 8 * 2 * 8  # one position chunk: 100 steps x 8 walkers x 2 params, float64
#: a bomb run may take at most this much more memory than the same command on the intact
#: store (a decoded bomb adds 1,024 MiB for zstd, 64 MiB for the others)
RSS_SLACK_MIB = 48


def pos_chunk(i: int) -> str:
    return f"{POS}/c/{i}/0/0"


# ---------------------------------------------------------------------------- crafting helpers
def zstd_frame(total: int, *, declare: bool) -> bytes:
    """A zstd frame of RLE blocks expanding to ``total`` zero bytes (RFC 8878, 3.1.1): 4 bytes
    per 128 KiB block, so 1 GiB takes 32 KiB; the header declares ``total`` or no size."""
    out = bytearray(struct.pack("<I", 0xFD2FB528))
    out += bytes([0xC0 if declare else 0x00, 0x58])  # size field of 8 bytes / none; window
    if declare:
        out += struct.pack("<Q", total)
    left = total
    while left:
        n = min(128 * 1024, left)
        left -= n
        out += (int(left == 0) | (1 << 1) | (n << 3)).to_bytes(3, "little") + b"\0"
    return bytes(out)


def reseal(store: Path) -> None:
    """Recompute the commit's seal over the store as it now is (what an attacker can do: the
    seal is not a signature), so that only the decoding bounds stand against a crafted chunk."""
    record = json.loads((store / "commit.json").read_text())
    block = record["integrity"]
    for name, sums in block["files"].items():
        for i in range(len(sums)):
            key = f"draws/{name}/c/{i}/0" + ("/0" if name == "position" else "")
            file = store / key
            sums[i] = bytes_checksum(file.read_bytes()) if file.is_file() else None
    for node in block["arrays"]:
        meta = json.loads((store / node / "zarr.json").read_text())
        block["arrays"][node] = canonical_sha256(metadata_without_shape(meta))
    attrs = json.loads((store / "zarr.json").read_text())["attributes"]["chainyard"]
    block["attrs"] = keyed_hashes(attrs)
    block["record"] = keyed_hashes({k: v for k, v in record.items() if k != "integrity"})
    block["self"] = self_hash(block)
    (store / "commit.json").write_text(json.dumps(record))


def flip_byte(store: Path) -> None:
    """One byte flipped in the middle of position chunk 1 (raw bytes: it still decodes)."""
    file = store / pos_chunk(1)
    data = bytearray(file.read_bytes())
    data[len(data) // 2] ^= 0x01
    file.write_bytes(bytes(data))


def swap_chunks(store: Path) -> None:
    """position chunks 0 and 1 swapped (each decodes, to another chunk's values)."""
    a, b = store / pos_chunk(0), store / pos_chunk(1)
    da, db = a.read_bytes(), b.read_bytes()
    a.write_bytes(db)
    b.write_bytes(da)


def steps_done_up(store: Path) -> None:
    """``steps_done`` edited up to the 300 steps allocated (from fewer)."""
    record = json.loads((store / "commit.json").read_text())
    assert record["steps_done"] < 300 and (store / pos_chunk(2)).is_file()
    record["steps_done"] = 300
    (store / "commit.json").write_text(json.dumps(record))


# ---------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One complete store per codec (``none``, ``zstd``, ``blosc_zstd``, ``pcodec``), a store of
    the ``none`` codec killed before its third commit (rows past the commit), a burn-in record
    and a pack of the zstd store."""
    root = tmp_path_factory.mktemp("integrity")
    for codec in ("none", "zstd", "blosc_zstd", "pcodec"):
        cfg = base_config(
            sampler={"walkers": 8, "steps": 300},
            # on the thread, commits stay at steps 100, 200, 300 (the kill below needs three)
            storage={
                "chunk_steps": 100,
                "commit_every_steps": 100,
                "codec": codec,
                "fsync": False,
                "commit_writer": "thread",
            },
        )
        config = write_run(root, cfg, name=f"{codec}.yaml")
        res = cli("sample", str(config), "--out", f"{codec}.zarr", "--progress", "off", cwd=root)
        assert res.returncode == 0, res.stderr
    # killed after writing the rows of its third commit, before the commit point: 200 steps
    # committed and the rows of steps 200-299 on disk (what an upward edit would expose)
    env = {"CHAINYARD_TEST_KILL_AT": "chunks-written:3"}
    res = cli(
        "sample", "none.yaml", "--out", "partial.zarr", "--progress", "off", cwd=root, env=env
    )
    assert res.returncode == -9, res.stderr
    for args in (
        ("decide", "burn-in", "none.zarr", "--out", "bi.json"),
        ("pack", "zstd.zarr", "--out", "zstd.zip"),
    ):
        res = cli(*args, cwd=root)
        assert res.returncode == 0, res.stderr
    return root


def copy_store(runs: Path, name: str, dst: Path) -> Path:
    dst.mkdir(parents=True, exist_ok=True)
    return Path(shutil.copytree(runs / name, dst / "s.zarr"))


def reader_jobs(store: Path, work: Path, bi: Path) -> dict[str, Job]:
    """Every command that reads a store's rows, each writing (if at all) below ``work``."""
    s = str(store)
    return {
        "diagnose": Job(("diagnose", s, "--raw"), work),
        "summarise": Job(("results-table", s, "--raw"), work),
        "export": Job(("export", s, "--raw", "-o", str(work / "out.csv")), work),
        "plot": Job(("plot", s, "--raw", "-o", str(work / "plots")), work),
        "decide": Job(("decide", "burn-in", s, "--out", str(work / "bi.json")), work),
        "derive": Job(
            ("derive", s, "--out", str(work / "d.zarr"), "--burn-in-record", str(bi)), work
        ),
        "pack": Job(("pack", s, "--out", str(work / "s.zip")), work),
        "verify": Job(("verify", s), work),
    }


def check_refused(run: Run, what: str, status: int, names: str) -> None:
    """The status, no traceback; one error line naming ``names`` (verify: its report does)."""
    text = run.stdout + run.stderr
    assert "Traceback" not in text, f"{what}: {text[-2000:]}"
    assert run.returncode == status, f"{what}: exit {run.returncode}: {text[-2000:]}"
    assert names in text, f"{what}: {names!r} not named in {text[-2000:]!r}"
    if not what.startswith("verify"):
        lines = run.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("chainyard: error: "), f"{what}: {lines}"


# ---------------------------------------------------------------------------- items 1 and 2
DAMAGE = {
    # name: (base store, damage, text the refusal names)
    "byte flipped in a position chunk": ("none.zarr", flip_byte, f"{POS} chunk 1 (steps 100-199)"),
    "position chunks swapped": ("none.zarr", swap_chunks, f"{POS} chunk 0 (steps 0-99)"),
    "steps_done edited upward": ("partial.zarr", steps_done_up, "steps_done"),
}


@pytest.mark.slow
@pytest.mark.parametrize("case", list(DAMAGE))
def test_decodable_damage_is_refused_by_every_reader(
    case: str, runs: Path, tmp_path: Path, tally: Tally
) -> None:
    """Damage that still decodes: exit 4 from every reader and from every command writing a new
    sealed artefact (derive, pack, export), one line naming the array, chunk and steps; verify
    7; no output left; the store unchanged. Before: diagnose, summarise, export, plot and
    derive exited 0 (export wrote rows past the commit, derive sealed the damage)."""
    base, damage, names = DAMAGE[case]
    store = copy_store(runs, base, tmp_path)
    damage(store)
    before = snapshot(store)
    work = tmp_path / "work"
    work.mkdir()
    jobs = reader_jobs(store, work, runs / "bi.json")
    results = dict(zip(jobs, run_batch(list(jobs.values()), tmp_path / ".runs"), strict=True))
    for what, run in results.items():
        check_refused(run, f"{case}: {what}", 7 if what == "verify" else 4, names)
        tally.input()
    left = sorted(p.name for p in work.iterdir() if not p.name.endswith(".lock"))  # derive's lock
    assert left == [], "a refused command left output"
    tally.assert_intact(before, store, case)


# ---------------------------------------------------------------------------- item 3
def _replace_chunk(store: Path, data: bytes) -> None:
    (store / pos_chunk(1)).write_bytes(data)
    reseal(store)


def _gzip_store(store: Path) -> None:
    """The ``none`` store re-encoded with the gzip codec (chainyard reads gzip, writes none)."""
    for node in (POS, LP):
        meta_file = store / node / "zarr.json"
        meta = json.loads(meta_file.read_text())
        meta["codecs"] = [meta["codecs"][0], {"name": "gzip", "configuration": {"level": 5}}]
        meta_file.write_text(json.dumps(meta))
        for chunk in sorted((store / node / "c").rglob("*")):
            if chunk.is_file():
                chunk.write_bytes(gzip.compress(chunk.read_bytes()))
    reseal(store)


def _pcodec_bomb() -> bytes:
    import numcodecs

    codec = numcodecs.get_codec({"id": "pcodec", "level": 8})
    return bytes(codec.encode(np.zeros(64 * 2**20 // 8)))


def _blosc_bomb() -> bytes:
    import numcodecs

    return bytes(numcodecs.Blosc(cname="zstd", clevel=5, shuffle=1).encode(bytes(64 * 2**20)))


BOMBS: dict[str, tuple[str, Any]] = {
    # name: (base store, (store) -> None making the bomb)
    "zstd frame declaring 1 GiB": (
        "zstd.zarr",
        lambda s: _replace_chunk(s, zstd_frame(2**30, declare=True)),
    ),
    "zstd frame of 1 GiB declaring no size": (
        "zstd.zarr",
        lambda s: _replace_chunk(s, zstd_frame(2**30, declare=False)),
    ),
    "zstd frame declaring the chunk's size, holding 1 GiB": (
        "zstd.zarr",
        lambda s: _replace_chunk(
            s, zstd_frame(CHUNK_BYTES, declare=True)[:-4] + zstd_frame(2**30, declare=False)[6:]
        ),
    ),
    "blosc holding 64 MiB": ("blosc_zstd.zarr", lambda s: _replace_chunk(s, _blosc_bomb())),
    "pcodec holding 64 MiB": ("pcodec.zarr", lambda s: _replace_chunk(s, _pcodec_bomb())),
    "gzip holding 64 MiB": (
        "none.zarr",
        lambda s: (_gzip_store(s), _replace_chunk(s, gzip.compress(bytes(64 * 2**20)))),
    ),
}


@pytest.mark.slow
def test_decompression_bombs_are_refused_with_bounded_memory(
    runs: Path, tmp_path: Path, tally: Tally
) -> None:
    """Every allowed codec: a chunk expanding far past its size (seal recomputed) is refused
    before it is decoded: verify 7, the other commands 4, naming the chunk; peak RSS within
    RSS_SLACK_MIB of the intact store's. Before: a 1 GiB zstd frame took each command to a
    2.18 GB peak (3.2 GB without a declared size)."""
    jobs: list[tuple[str, str, Job]] = []
    commands = ("verify", "diagnose", "summarise", "export", "derive", "pack")
    for case, (base, make) in BOMBS.items():
        for kind in ("intact", "bomb"):
            store = copy_store(runs, base, tmp_path / case.replace(" ", "_") / kind)
            if kind == "bomb":
                make(store)
            elif case.startswith("gzip"):
                _gzip_store(store)
            work = store.parent / "work"
            work.mkdir()
            every = reader_jobs(store, work, runs / "bi.json")
            # every command for the zstd frame; verify and diagnose for the others
            chosen = commands if case == "zstd frame declaring 1 GiB" else ("verify", "diagnose")
            jobs += [(case, f"{kind} {c}", every[c]) for c in chosen]
    results = run_batch([j for _, _, j in jobs], tmp_path / ".runs")
    got = {(case, what): run for (case, what, _), run in zip(jobs, results, strict=True)}
    for (case, what), run in got.items():
        kind, command = what.split(" ", 1)
        if kind == "intact":
            assert run.returncode == 0, f"{case}: {what}: {run.stderr[-1500:]}"
            continue
        check_refused(run, f"{case}: {command}", 7 if command == "verify" else 4, f"{POS} chunk 1")
        intact = got[(case, f"intact {command}")].rss_mib
        print(f"{case}: {command}: peak RSS intact {intact:.0f} MiB, bomb {run.rss_mib:.0f} MiB")
        assert run.rss_mib < intact + RSS_SLACK_MIB, (case, command, intact, run.rss_mib)
        tally.input()


@pytest.mark.slow
def test_decompression_bomb_in_a_pack(runs: Path, tmp_path: Path, tally: Tally) -> None:
    """The 1 GiB zstd frame inside a pack (manifest and seal matching): verify 7, diagnose,
    summarise and export 4, each within RSS_SLACK_MIB of the intact pack's peak. Before: 2.18 GB
    from a 162 KB pack."""
    store = copy_store(runs, "zstd.zarr", tmp_path / "bomb")
    _replace_chunk(store, zstd_frame(2**30, declare=True))
    members = _members(runs / "zstd.zip")
    replace = {
        name: (members[name][0], (store / name).read_bytes())
        for name in ("commit.json", pos_chunk(1))
    }
    pack = craft(runs / "zstd.zip", tmp_path / "bomb.zip", replace=replace)
    jobs, names = [], []
    for kind, target in (("intact", runs / "zstd.zip"), ("bomb", pack)):
        work = tmp_path / kind
        work.mkdir(exist_ok=True)
        every = reader_jobs(target, work, runs / "bi.json")
        for c in ("verify", "diagnose", "summarise", "export"):
            jobs.append(every[c])
            names.append((kind, c))
    got = dict(zip(names, run_batch(jobs, tmp_path / ".runs"), strict=True))
    for (kind, command), run in got.items():
        if kind == "intact":
            assert run.returncode == 0, f"{command}: {run.stderr[-1500:]}"
            continue
        check_refused(run, f"pack: {command}", 7 if command == "verify" else 4, f"{POS} chunk 1")
        intact = got[("intact", command)].rss_mib
        print(f"pack: {command}: peak RSS intact {intact:.0f} MiB, bomb {run.rss_mib:.0f} MiB")
        assert run.rss_mib < intact + RSS_SLACK_MIB, (command, intact, run.rss_mib)
        tally.input()


def test_decoding_bounds_hold_in_process() -> None:
    """The bounds themselves (no store): each crafted stream is refused by decode_chunk with
    the reason; an honest chunk of each codec decodes to its values."""
    import numcodecs

    from chainyard.store.decode import ChunkDecodeError, decode_chunk

    shape, dtype = (100, 8, 2), np.dtype("float64")
    values = np.arange(1600.0).reshape(shape)
    raw = [{"name": "bytes", "configuration": {"endian": "little"}}]
    honest = {
        "zstd": ([*raw, {"name": "zstd"}], numcodecs.Zstd(level=3).encode(values.tobytes())),
        "blosc": ([*raw, {"name": "blosc"}], numcodecs.Blosc(cname="lz4").encode(values.tobytes())),
        "gzip": ([*raw, {"name": "gzip"}], gzip.compress(values.tobytes())),
        "pcodec": (
            [{"name": "numcodecs.pcodec"}],
            numcodecs.get_codec({"id": "pcodec"}).encode(values),
        ),
        "bytes": (raw, values.tobytes()),
    }
    for name, (codecs, data) in honest.items():
        assert np.array_equal(decode_chunk(codecs, data, shape, dtype), values), name
    crafted = {
        "declares 1,073,741,824": (honest["zstd"][0], zstd_frame(2**30, declare=True)),
        "declares no content size": (honest["zstd"][0], zstd_frame(2**30, declare=False)),
        "blosc header declares": (honest["blosc"][0], _blosc_bomb()),
        "gzip stream holds more": (honest["gzip"][0], gzip.compress(bytes(2**24))),
        "more values": (honest["pcodec"][0], _pcodec_bomb()),
        "bytes where the chunk holds": (raw, values.tobytes() + b"\0" * 8),
        "not read by chainyard": ([*raw, {"name": "bz2"}], b""),
    }
    for reason, (codecs, data) in crafted.items():
        with pytest.raises(ChunkDecodeError, match=reason):
            decode_chunk(codecs, data, shape, dtype)


# ---------------------------------------------------------------------------- items 9 and 17
def _symlinked_array(store: Path) -> str:
    outside = store.parent / "elsewhere"
    shutil.move(store / LP, outside)
    os.symlink(outside, store / LP)
    return LP


def _symlinked_chunk(store: Path) -> str:
    outside = store.parent / "chunk"
    shutil.move(store / pos_chunk(2), outside)
    os.symlink(outside, store / pos_chunk(2))
    return pos_chunk(2)


def _stray_code(store: Path) -> str:
    (store / "evil.py").write_text("import os\nos.system('echo owned')\n")
    (store / POS / "notes.txt").write_text("not chainyard's\n")
    return "evil.py"


FOREIGN = {
    "array folder is a symlink": (_symlinked_array, "symbolic link"),
    "chunk file is a symlink": (_symlinked_chunk, "symbolic link"),
    "stray files": (_stray_code, "not written by chainyard"),
}


@pytest.mark.slow
@pytest.mark.parametrize("case", list(FOREIGN))
def test_links_and_unknown_files_fail_verify_and_pack(
    case: str, runs: Path, tmp_path: Path, tally: Tally
) -> None:
    """verify lists the link or file (exit 7); pack refuses naming it (exit 4) and writes no
    pack. Before: verify passed, pack dropped a linked folder and shipped a stray evil.py."""
    make, why = FOREIGN[case]
    store = copy_store(runs, "none.zarr", tmp_path)
    named = make(store)
    before = snapshot(store)
    work = tmp_path / "work"
    work.mkdir()
    every = reader_jobs(store, work, runs / "bi.json")
    verify, pack = run_batch([every["verify"], every["pack"]], tmp_path / ".runs")
    check_refused(verify, f"{case}: verify", 7, named)
    assert why in verify.stdout, verify.stdout
    if case == "stray files":
        assert f"{POS}/notes.txt" in verify.stdout, verify.stdout  # every unknown file listed
    check_refused(pack, f"{case}: pack", 4, named)
    assert why in pack.stderr
    if case == "stray files":
        assert f"{POS}/notes.txt" in pack.stderr, pack.stderr
    assert not list(work.iterdir()), "pack left output"
    tally.assert_intact(before, store, case)
    tally.input(2)


@pytest.mark.slow
def test_tolerated_files_do_not_fail_verify(runs: Path, tmp_path: Path) -> None:
    """Snakemake's empty timestamp and a writer's leftover temporary file are no damage:
    verify passes (the leftover noted), pack ships neither."""
    store = copy_store(runs, "none.zarr", tmp_path)
    (store / ".snakemake_timestamp").write_bytes(b"")
    (store / POS / "c" / "1" / "0" / ".0.4242.partial").write_bytes(b"x")
    res = cli("verify", str(store))
    assert res.returncode == 0, res.stdout + res.stderr
    assert "temporary file left by an interrupted write" in res.stdout
    res = cli("pack", str(store), "--out", str(tmp_path / "s.zip"))
    assert res.returncode == 0, res.stderr
    with zipfile.ZipFile(tmp_path / "s.zip") as z:
        names = z.namelist()
    assert not [n for n in names if "snakemake" in n or n.endswith(".partial")], names


@pytest.mark.slow
def test_derive_api_refuses_damaged_source(runs: Path, tmp_path: Path, tally: Tally) -> None:
    """``derive_store`` (what ``derive`` and the workflow's standalone step call) refuses a
    source with a flipped byte: StoreError naming the chunk, no output, source unchanged.
    Before: the damage was sealed into a derived store that then verified."""
    from chainyard.analysis.derive import derive_store
    from chainyard.errors import StoreError
    from chainyard.store import Store

    store = copy_store(runs, "none.zarr", tmp_path)
    flip_byte(store)
    before = snapshot(store)
    with pytest.raises(StoreError, match=r"draws/position chunk 1 \(steps 100-199\) does not"):
        derive_store(Store.open(store), tmp_path / "d.zarr", discard=50, factor=2)
    assert not (tmp_path / "d.zarr").exists()
    tally.assert_intact(before, store, "derive_store")
    tally.input()
