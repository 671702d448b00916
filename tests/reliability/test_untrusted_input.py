"""Untrusted input: crafted packs and stores through every reading command.

Each crafted pack breaks one safety rule of :func:`chainyard.store.packed.open_pack` (or a
limit of :mod:`chainyard.limits`) and goes through ``verify``, ``inspect``, ``unpack``,
``export-prov`` and ``verify --replay`` (without ``--run-pack-code``), each a real process.
Every case asserts the exit status (verify 7 for a broken rule or an unreadable file, the
others 4; a limit 4 everywhere), exactly one ``chainyard: error:`` line naming the member or
file, no traceback, nothing written outside the target, and for the oversized cases a peak
RSS of the child below a stated bound. A last test proves that no reading command imports
code from a pack unless ``--run-pack-code`` is given.
"""

from __future__ import annotations

import hashlib
import json
import stat
import struct
import subprocess
import sys
import zipfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import pytest

from tests.conftest import base_config, cli, write_run
from tests.patience import PATIENCE
from tests.reliability.conftest import snapshot

pytestmark = pytest.mark.slow

#: a child running a reading command on a small store takes ~145 MiB (numpy, zarr, pydantic
#: imported); before bounded reading, a 190 MB member took verify and unpack to 506 MiB and a
#: declared chunk of 500,000 steps took verify to 388 MiB (measured in a child, wait4)
RSS_BOUND_MIB = 230

#: model that leaves a marker file when imported (if CY_TEST_MARKER names one)
MARKER_MODEL = """
import os
import numpy as np

_marker = os.environ.get("CY_TEST_MARKER")
if _marker:
    with open(_marker, "w") as f:
        f.write("imported")

def log_prob(theta, data):
    return -0.5 * float(np.dot(theta, theta))
"""


@dataclass
class Run:
    """A finished child process: exit status, output and peak RSS (MiB)."""

    returncode: int
    stdout: str
    stderr: str
    rss_mib: float


#: runs a batch of chainyard commands, each in its own forked child of one interpreter that
#: imported chainyard once (a fresh interpreter per command costs ~1 s of imports); each child
#: has its own cwd, environment, stdout/stderr files and exit status, and wait4 gives its
#: peak RSS. Input (stdin) and output (stdout): JSON lists.
DRIVER = r"""
import json, os, sys, traceback
import chainyard.cli
import chainyard.provenance.commands, chainyard.provenance.verify, chainyard.provenance.pack
import chainyard.provenance.inspect, chainyard.provenance.record, chainyard.provenance.replay
batch = json.load(sys.stdin)
results = []
for job in batch:
    pid = os.fork()
    if pid == 0:
        try:
            os.chdir(job["cwd"])
            os.environ.update(job["env"])
            fd_out = os.open(job["stdout"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC)
            fd_err = os.open(job["stderr"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC)
            os.dup2(fd_out, 1)
            os.dup2(fd_err, 2)
            sys.argv = ["chainyard", *job["args"]]
            try:
                code = chainyard.cli.main()
            except SystemExit as exc:
                code = exc.code if isinstance(exc.code, int) else 1
            except BaseException:
                traceback.print_exc()
                code = 1
            sys.stdout.flush()
            sys.stderr.flush()
        finally:
            os._exit(code if isinstance(code, int) else 1)
    _, status, usage = os.wait4(pid, 0)
    results.append({"status": os.waitstatus_to_exitcode(status), "rss_kib": usage.ru_maxrss})
json.dump(results, sys.stdout)
"""


@dataclass
class Job:
    """One command of a batch: its arguments, working folder and extra environment."""

    args: tuple[str, ...]
    cwd: Path
    env: dict[str, str] | None = None


def run_batch(jobs: list[Job], scratch: Path) -> list[Run]:
    """Run every job as its own child process (see :data:`DRIVER`); results in order."""
    scratch.mkdir(parents=True, exist_ok=True)
    spec = [
        {
            "args": list(job.args),
            "cwd": str(job.cwd),
            "env": job.env or {},
            "stdout": str(scratch / f"{i}.out"),
            "stderr": str(scratch / f"{i}.err"),
        }
        for i, job in enumerate(jobs)
    ]
    proc = subprocess.run(
        [sys.executable, "-c", DRIVER],
        input=json.dumps(spec),
        capture_output=True,
        text=True,
        timeout=PATIENCE,
    )
    assert proc.returncode == 0, proc.stderr
    out = []
    for job, got in zip(spec, json.loads(proc.stdout), strict=True):
        out.append(
            Run(
                got["status"],
                Path(job["stdout"]).read_text(errors="replace"),
                Path(job["stderr"]).read_text(errors="replace"),
                got["rss_kib"] / 1024,
            )
        )
    return out


def run_measured(*args: str, cwd: Path, env: dict[str, str] | None = None) -> Run:
    """Run ``chainyard ARGS`` in a child process; its exit status, output and peak RSS."""
    return run_batch([Job(args, cwd, env)], cwd / ".runs")[0]


# ------------------------------------------------------------------ the base pack


@pytest.fixture(scope="module")
def base(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A sampled store (model leaves a marker when CY_TEST_MARKER is set) and its pack."""
    folder = tmp_path_factory.mktemp("base")
    cfg = base_config(
        sampler={"walkers": 16, "steps": 50}, storage={"chunk_steps": 25, "fsync": False}
    )
    path = write_run(folder, cfg, model=MARKER_MODEL)
    for args in (
        ("sample", str(path), "--out", "s.zarr", "--progress", "off"),
        ("pack", "s.zarr", "--out", "s.zip"),
    ):
        res = cli(*args, cwd=folder)
        assert res.returncode == 0, res.stderr
    return folder


def _members(pack: Path) -> dict[str, tuple[zipfile.ZipInfo, bytes]]:
    with zipfile.ZipFile(pack) as z:
        return {i.filename: (i, z.read(i)) for i in z.infolist()}


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _info(name: str, *, mode: int = stat.S_IFREG | 0o644, deflate: bool = False) -> zipfile.ZipInfo:
    info = zipfile.ZipInfo(name, date_time=(1980, 1, 1, 0, 0, 0))
    info.external_attr = mode << 16
    info.compress_type = zipfile.ZIP_DEFLATED if deflate else zipfile.ZIP_STORED
    return info


def craft(
    base_pack: Path,
    dst: Path,
    *,
    replace: dict[str, tuple[zipfile.ZipInfo, bytes] | None] | None = None,
    extra: list[tuple[zipfile.ZipInfo, bytes]] | None = None,
    listed: bool = True,
    manifest: Callable[[dict], None] | None = None,
    raw_manifest: bytes | None = None,
) -> Path:
    """A copy of ``base_pack`` with members replaced/removed/added; the manifest lists the
    changed members with their true hashes when ``listed`` (so only the rule under test
    breaks), and may be edited by ``manifest`` or replaced by ``raw_manifest``."""
    members = _members(base_pack)
    man = json.loads(members["pack/manifest.json"][1])
    for name, new in (replace or {}).items():
        if new is None:
            members.pop(name)
            continue
        members[name] = new
        if listed:
            man["members"][name] = {"sha256": _sha(new[1]), "size": len(new[1])}
    if manifest is not None:
        manifest(man)
    text = raw_manifest if raw_manifest is not None else json.dumps(man).encode()
    members["pack/manifest.json"] = (_info("pack/manifest.json", deflate=True), text)
    with zipfile.ZipFile(dst, "w") as z:
        for info, data in [*members.values(), *(extra or [])]:
            z.writestr(info, data)
    return dst


def _patch_sizes(pack: Path, name: str, size: int) -> None:
    """Make the zip declare ``size`` uncompressed bytes for ``name`` (local + central)."""
    raw = bytearray(pack.read_bytes())
    encoded = name.encode()
    at = 0
    while (at := raw.find(b"PK\x03\x04", at)) >= 0:
        n = struct.unpack("<H", raw[at + 26 : at + 28])[0]
        if raw[at + 30 : at + 30 + n] == encoded:
            raw[at + 22 : at + 26] = struct.pack("<I", size)
        at += 4
    at = 0
    while (at := raw.find(b"PK\x01\x02", at)) >= 0:
        n = struct.unpack("<H", raw[at + 28 : at + 30])[0]
        if raw[at + 46 : at + 46 + n] == encoded:
            raw[at + 24 : at + 28] = struct.pack("<I", size)
        at += 4
    pack.write_bytes(bytes(raw))


# ------------------------------------------------------------------ the crafted packs


@dataclass
class Case:
    """One crafted pack: how to make it, what the error names, the expected statuses."""

    name: str
    make: Callable[[Path, Path], Path]
    names: str  # text the error line must hold (member or file)
    verify: int = 7  # verify's status (7: a rule broken or unreadable; 4: over a limit)
    others: int = 4  # inspect, unpack, export-prov
    env: dict[str, str] | None = None
    rss: bool = False  # oversized case: check the peak RSS


def _text(name: str, data: bytes = b"x") -> tuple[zipfile.ZipInfo, bytes]:
    return _info(name), data


def _zero_bomb(size: int) -> bytes:
    return b"\0" * size


def _bomb(b: Path, d: Path) -> Path:
    data = _zero_bomb(20 * 2**20)
    return craft(
        b,
        d,
        replace={"pack/sources/model.py": (_info("pack/sources/model.py", deflate=True), data)},
    )


def _big_member(b: Path, d: Path) -> Path:
    # 72 MB of text at a ratio near 400: allowed with CHAINYARD_MAX_PACK_RATIO raised, so
    # verify and unpack stream it through (before, each read it whole)
    data = b"# pad pad pad pad\n" * (72_000_000 // 18)
    info = _info("pack/sources/model.py", deflate=True)
    return craft(b, d, replace={"pack/sources/model.py": (info, data)})


def _lying_size(b: Path, d: Path) -> Path:
    # commit.json followed by 8 MiB of spaces (still valid JSON), deflated; the zip then
    # declares only the original size (the manifest already lists that size and hash)
    commit = _members(b)["commit.json"][1]
    padded = commit + b" " * (8 * 2**20)
    info = _info("commit.json", deflate=True)
    out = craft(b, d, replace={"commit.json": (info, padded)}, listed=False)
    _patch_sizes(out, "commit.json", len(commit))
    with zipfile.ZipFile(out) as z:
        assert z.getinfo("commit.json").file_size == len(commit)
    return out


def _chunk_steps(b: Path, d: Path) -> Path:
    changes = {}
    members = _members(b)
    for arr in ("position", "log_prob", "accepted"):
        key = f"draws/{arr}/zarr.json"
        meta = json.loads(members[key][1])
        meta["chunk_grid"]["configuration"]["chunk_shape"][0] = 500_000
        changes[key] = (members[key][0], json.dumps(meta).encode())
    return craft(b, d, replace=changes)


def _nul_name(b: Path, d: Path) -> Path:
    # write a placeholder name of the same length, then put a NUL into its bytes
    out = craft(b, d, extra=[_text("pack/nulXname.txt")], listed=False)
    raw = out.read_bytes().replace(b"pack/nulXname.txt", b"pack/nul\0name.txt")
    out.write_bytes(raw)
    return out


def _truncated(b: Path, d: Path) -> Path:
    raw = b.read_bytes()
    d.write_bytes(raw[: len(raw) // 2])
    return d


def _sources_escape(b: Path, d: Path) -> Path:
    def edit(man: dict) -> None:
        man["sources"][0]["path"] = "../" * 40 + "etc/cron.d/x"

    return craft(b, d, manifest=edit)


CASES = [
    Case(
        "dotdot",
        lambda b, d: craft(b, d, extra=[_text("../escaped.txt")]),
        "'../escaped.txt'",
    ),
    Case("absolute", lambda b, d: craft(b, d, extra=[_text("/tmp/abs.txt")]), "'/tmp/abs.txt'"),
    Case(
        "backslash", lambda b, d: craft(b, d, extra=[_text("pack\\evil.txt")]), "'pack\\\\evil.txt'"
    ),
    Case("drive_letter", lambda b, d: craft(b, d, extra=[_text("C:/evil.txt")]), "'C:/evil.txt'"),
    Case(
        "control_char",
        lambda b, d: craft(b, d, extra=[_text("pack/a\x01b.txt")]),
        "'pack/a\\x01b.txt'",
    ),
    # Python's zipfile cuts a name at its NUL: the shortened name is not in the manifest
    Case("nul_char", _nul_name, "'pack/nul'"),
    Case(
        "duplicate",
        lambda b, d: craft(b, d, extra=[(_info("pack/config.json"), b"{}")]),
        "'pack/config.json'",
    ),
    Case(
        "symlink",
        lambda b, d: craft(
            b,
            d,
            replace={
                "pack/sources/model.py": (
                    _info("pack/sources/model.py", mode=stat.S_IFLNK | 0o777),
                    b"/etc/passwd",
                )
            },
        ),
        "'pack/sources/model.py': a symbolic link",
    ),
    Case(
        "fifo",
        lambda b, d: craft(
            b,
            d,
            replace={
                "pack/config.json": (_info("pack/config.json", mode=stat.S_IFIFO | 0o644), b"")
            },
        ),
        "'pack/config.json': not a regular file",
    ),
    Case(
        "bzip2",
        lambda b, d: craft(
            b, d, replace={"pack/config.json": (_bz2_info("pack/config.json"), b"{}")}
        ),
        "'pack/config.json': compression method 12",
    ),
    Case(
        "file_below_file",
        lambda b, d: craft(b, d, replace={"pack/config.json/x": _text("pack/config.json/x")}),
        "'pack/config.json/x': lies below a member that is a file",
    ),
    Case(
        "not_in_manifest",
        lambda b, d: craft(b, d, extra=[_text("pack/extra.txt")], listed=False),
        "'pack/extra.txt': not listed in the manifest",
    ),
    Case(
        "missing_from_zip",
        lambda b, d: craft(b, d, replace={"pack/config.json": None}),
        "'pack/config.json': listed in the manifest but missing from the zip",
    ),
    Case(
        "size_differs",
        lambda b, d: craft(
            b, d, manifest=lambda m: m["members"]["pack/config.json"].update(size=1)
        ),
        "'pack/config.json': declared size",
    ),
    Case(
        "manifest_not_json",
        lambda b, d: craft(b, d, raw_manifest=b'{"format": "chainyard.pack", '),
        "'pack/manifest.json': not valid JSON",
    ),
    Case(
        "manifest_missing",
        lambda b, d: _drop_manifest(b, d),
        "'pack/manifest.json': missing",
    ),
    Case("source_path_escapes", _sources_escape, "is not a plain relative path"),
    Case("truncated_zip", _truncated, "not a zip file (or truncated)"),
    Case(
        "not_a_zip",
        lambda b, d: (d.write_text("model: x\n"), d)[1],
        "not a zip file (or truncated)",
    ),
    Case("empty_file", lambda b, d: (d.write_bytes(b""), d)[1], "empty file"),
    Case(
        "zip_bomb",
        _bomb,
        "'pack/sources/model.py': uncompressed / compressed size",
        verify=4,
        rss=True,
    ),
    Case(
        "declared_chunk_steps",
        _chunk_steps,
        "zarr.json (chunk_shape [500000, 16",
        verify=4,
        rss=True,
    ),
    Case(
        "too_many_members",
        lambda b, d: craft(b, d),
        "number of members in a pack is",
        verify=4,
        env={"CHAINYARD_MAX_PACK_MEMBERS": "10"},
    ),
    Case(
        "lying_file_size",
        _lying_size,
        "'commit.json': unreadable",
        rss=True,
    ),
]


def _bz2_info(name: str) -> zipfile.ZipInfo:
    info = _info(name)
    info.compress_type = zipfile.ZIP_BZIP2
    return info


def _drop_manifest(b: Path, d: Path) -> Path:
    with zipfile.ZipFile(b) as src, zipfile.ZipFile(d, "w") as dst:
        for info in src.infolist():
            if info.filename != "pack/manifest.json":
                dst.writestr(info, src.read(info))
    return d


def _listing(folder: Path) -> list[str]:
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*"))


def _assert_one_line(run: Run, status: int, names: str, what: str) -> None:
    assert "Traceback" not in run.stderr, f"{what}: {run.stderr}"
    lines = run.stderr.strip().splitlines()
    assert run.returncode == status, f"{what}: exit {run.returncode}: {run.stderr}"
    assert len(lines) == 1 and lines[0].startswith("chainyard: error: "), f"{what}: {lines}"
    assert names in lines[0], f"{what}: {lines[0]!r} does not name {names!r}"


COMMANDS = ("verify", "verify --replay", "inspect", "unpack", "export-prov")


@pytest.fixture(scope="module")
def refused(base: Path, tmp_path_factory: pytest.TempPathFactory) -> dict[str, dict]:
    """Every crafted pack through every reading command (one batch of child processes), with
    listings of the pack folder, the working folder and the unpack target's parent taken
    before and after."""
    root = tmp_path_factory.mktemp("crafted")
    jobs: list[Job] = []
    cases: dict[str, dict] = {}
    for case in CASES:
        packs, work, dest = (
            root / case.name / "packs",
            root / case.name / "work",
            root / case.name / "dest",
        )
        for d in (packs, work, dest):
            d.mkdir(parents=True)
        pack = case.make(base / "s.zip", packs / "p.zip")
        cases[case.name] = {"dirs": {d: _listing(d) for d in (packs, work, dest)}, "runs": {}}
        argv = {
            "verify": ("verify", str(pack)),
            "verify --replay": ("verify", str(pack), "--replay", "5"),
            "inspect": ("inspect", str(pack)),
            "unpack": ("unpack", str(pack), "--out", str(dest / "u")),
            "export-prov": ("export-prov", str(pack)),
        }
        for what in COMMANDS:
            jobs.append(Job(argv[what], work, case.env))
    runs = iter(run_batch(jobs, root / ".runs"))
    for case in CASES:
        for what in COMMANDS:
            cases[case.name]["runs"][what] = next(runs)
    return cases


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_crafted_pack_is_refused_by_every_reader(
    case: Case, refused: dict[str, dict], tally
) -> None:
    """A pack breaking one rule or limit: every reading command refuses it in one line, with
    the documented status, nothing written outside the target, bounded memory."""
    got = refused[case.name]
    for what, run in got["runs"].items():
        status = case.verify if what.startswith("verify") else case.others
        _assert_one_line(run, status, case.names, f"{case.name}: {what}")
        if case.rss:
            assert run.rss_mib < RSS_BOUND_MIB, f"{case.name}: {what}: {run.rss_mib:.0f} MiB"
    for d, listed in got["dirs"].items():
        assert _listing(d) == listed, f"{case.name}: {d.name} changed"
    tally.input()


def test_large_member_is_streamed_when_allowed(base: Path, tmp_path: Path, tally) -> None:
    """A 72 MB member (ratio raised by its variable) is verified and unpacked in blocks:
    peak RSS stays below the bound (before, a 190 MB member read whole took verify and unpack
    to 506 MiB, measured)."""
    pack = _big_member(base / "s.zip", tmp_path / "big.zip")
    env = {"CHAINYARD_MAX_PACK_RATIO": "100000"}
    ver = run_measured("verify", str(pack), cwd=tmp_path, env=env)
    assert ver.returncode == 0, ver.stderr  # consistent with its manifest: nothing to report
    assert "Traceback" not in ver.stderr
    assert ver.rss_mib < RSS_BOUND_MIB, f"verify: {ver.rss_mib:.0f} MiB"
    unp = run_measured("unpack", str(pack), "--out", str(tmp_path / "u"), cwd=tmp_path, env=env)
    assert unp.returncode == 0, unp.stderr
    assert (tmp_path / "u/pack/sources/model.py").stat().st_size == 72_000_000
    assert unp.rss_mib < RSS_BOUND_MIB, f"unpack: {unp.rss_mib:.0f} MiB"
    tally.input()


# ------------------------------------------------------------------ crafted stores


def _grow_chunk(store: Path) -> str:
    path = store / "draws/log_prob/c/1/0"
    path.write_bytes(path.read_bytes() + b"\0" * 2**20)
    return "draws/log_prob chunk 1 (steps 25-49): chunk file is"  # verify's line


def _huge_chunk_shape(store: Path) -> str:
    meta_path = store / "draws/position/zarr.json"
    meta = json.loads(meta_path.read_text())
    meta["chunk_grid"]["configuration"]["chunk_shape"][0] = 10**9
    meta_path.write_text(json.dumps(meta))
    return "draws/position/zarr.json"


def _json_edit(key: str, edit: Callable[[object], object]) -> Callable[[Path], str]:
    """Damage: replace the JSON file ``key`` of a store by ``edit(its content)``."""

    def damage(store: Path) -> str:
        path = store / key
        path.write_text(json.dumps(edit(json.loads(path.read_text()))))
        return "s.zarr"

    return damage


def _set(field: str, value: object, attrs: bool = False) -> Callable[[object], object]:
    def edit(doc: object) -> object:
        target = doc["attributes"]["chainyard"] if attrs else doc  # type: ignore[index]
        target[field] = value  # type: ignore[index]
        return doc

    return edit


def _truncate(key: str) -> Callable[[Path], str]:
    def damage(store: Path) -> str:
        path = store / key
        path.write_bytes(path.read_bytes()[:40])
        return "s.zarr"

    return damage


#: (name, damage -> text every error line must hold, verify statuses allowed, inspect and
#: export-prov statuses allowed). Damaged metadata is refused by Store.open (4) or reported
#: by verify as a failed check (7); never a traceback.
STORE_CASES: list[tuple[str, Callable[[Path], str], set[int], set[int]]] = [
    ("chunk_file_oversized", _grow_chunk, {7}, {0}),
    # the seal names the edit; no chunk of 10**9 steps is decoded (RSS bound below)
    ("declared_chunk_huge", _huge_chunk_shape, {4, 7}, {0, 4}),
    ("commit_is_a_list", _json_edit("commit.json", lambda d: []), {4, 7}, {4}),
    ("steps_done_not_a_number", _json_edit("commit.json", _set("steps_done", "abc")), {4, 7}, {4}),
    ("segments_not_a_list", _json_edit("commit.json", _set("segments", "x")), {4, 7}, {4}),
    ("param_names_a_number", _json_edit("zarr.json", _set("param_names", 5, True)), {4, 7}, {4}),
    ("identity_a_number", _json_edit("zarr.json", _set("identity", 5, True)), {4, 7}, {4}),
    ("array_metadata_truncated", _truncate("draws/position/zarr.json"), {4, 7}, {4}),
]


@pytest.fixture(scope="module")
def damaged(base: Path, tmp_path_factory: pytest.TempPathFactory) -> dict[str, dict]:
    """Every damaged store through verify, inspect and export-prov (one batch)."""
    import shutil

    root = tmp_path_factory.mktemp("damaged")
    jobs, out = [], {}
    for name, damage, _, _ in STORE_CASES:
        store = Path(shutil.copytree(base / "s.zarr", root / name / "s.zarr"))
        out[name] = {"names": damage(store), "before": snapshot(store), "store": store}
        for cmd in ("verify", "inspect", "export-prov"):
            jobs.append(Job((cmd, "s.zarr"), root / name))
    runs = iter(run_batch(jobs, root / ".runs"))
    for name, *_ in STORE_CASES:
        out[name]["runs"] = {cmd: next(runs) for cmd in ("verify", "inspect", "export-prov")}
    return out


@pytest.mark.parametrize(
    ("name", "verify_status", "read_status"),
    [(c[0], c[2], c[3]) for c in STORE_CASES],
    ids=[c[0] for c in STORE_CASES],
)
def test_damaged_store_gives_one_line(
    name: str, verify_status: set[int], read_status: set[int], damaged: dict[str, dict], tally
) -> None:
    """A damaged or crafted store: verify, inspect and export-prov end in one line (or a
    clean summary), never a traceback, within the RSS bound, and leave the store as it was."""
    got = damaged[name]
    for cmd, run in got["runs"].items():
        # export-prov reads only the attributes it exports: it may still succeed
        allowed = verify_status if cmd == "verify" else read_status
        allowed = allowed | {0} if cmd == "export-prov" else allowed
        assert run.returncode in allowed, f"{name}: {cmd}: exit {run.returncode}: {run.stderr}"
        assert "Traceback" not in run.stderr, f"{name}: {cmd}: {run.stderr}"
        assert run.rss_mib < RSS_BOUND_MIB, f"{name}: {cmd}: {run.rss_mib:.0f} MiB"
        if run.returncode:
            _assert_one_line(run, run.returncode, got["names"], f"{name}: {cmd}")
    tally.assert_intact(got["before"], got["store"], name)
    tally.input()


# ------------------------------------------------------------------ running pack code


def test_no_reading_command_imports_code_from_a_pack(base: Path, tmp_path: Path, tally) -> None:
    """A pack whose model writes a marker at import: no reading command (nor verify --replay
    without --run-pack-code, packed or unpacked) imports it; --run-pack-code does."""
    marker = tmp_path / "imported.txt"
    env = {"CY_TEST_MARKER": str(marker)}
    pack = base / "s.zip"
    unpacked = tmp_path / "u.zarr"
    res = run_measured("unpack", str(pack), "--out", str(unpacked), cwd=tmp_path, env=env)
    assert res.returncode == 0, res.stderr
    reads = [
        ("verify", str(pack)),
        ("inspect", str(pack)),
        ("export-prov", str(pack)),
        ("verify", str(unpacked)),
        ("inspect", str(unpacked)),
        ("verify", str(pack), "--replay", "5"),
        ("verify", str(unpacked), "--replay", "5"),
    ]
    runs = run_batch([Job(args, tmp_path, env) for args in reads], tmp_path / ".runs")
    for args, res in zip(reads, runs, strict=True):
        assert not marker.exists(), f"{args} imported the pack's model"
        if "--replay" not in args:
            assert res.returncode == 0, f"{args}: {res.stderr}"
            continue
        assert res.returncode == 2, res.stderr
        assert res.stderr.strip() == (
            f"chainyard: error: {args[1]}: replaying this pack would import and run code that "
            "came with it: model model.py:log_prob (bundled pack/sources/model.py); add "
            "--run-pack-code if you trust where the pack came from"
        )
    res = run_measured(
        "verify", str(pack), "--replay", "5", "--run-pack-code", cwd=tmp_path, env=env
    )
    assert res.returncode == 0, res.stderr
    assert marker.read_text() == "imported"  # the check above can see an import
    help_text = cli("verify", "--help").stdout
    assert "--run-pack-code" in help_text and "runs the model" in help_text
    tally.input(2)
