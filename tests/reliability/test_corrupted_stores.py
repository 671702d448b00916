"""Corrupted and damaged stores: one clear line, the documented exit status, nothing altered.

Two small real stores are made by ``chainyard sample`` (8 walkers, 2 parameters, one blob,
chunks of 100 steps): one complete at 300 steps and one killed after its fifth commit (250
steps, a resumable store whose last chunk is partial). Every case damages a copy of each the
same way and runs it through the Python API (``Store.open`` and every read method) and the
command line: ``inspect``, ``verify``, ``diagnose``, ``sample`` resuming the partial copy and
``sample --steps 400`` extending the complete copy. Each command must end with the exit status
of the case (4: unreadable or damaged, 7: verify found a problem; 0 where the command does not
read the damaged part, e.g. ``inspect`` reads no chunk), at most one ``chainyard: error:`` line
naming the file or array, no traceback, and both copies byte-identical afterwards (exit
statuses: the table in plugin/chainyard/errors.py).
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

from chainyard.errors import ChainyardError, StoreError
from chainyard.store import Store
from tests.conftest import base_config, cli, write_run
from tests.patience import PATIENCE
from tests.reliability.conftest import Tally, snapshot

BLOB_MODEL = """
import numpy as np

def log_prob(theta, data):
    r2 = float(theta @ theta)
    return -0.5 * r2, r2
"""

POS = "draws/position"
LP = "draws/log_prob"
ACC = "draws/accepted"
BLOB = "draws/blob/r2"


# ---------------------------------------------------------------------------- damage helpers
Damage = Callable[[Path], None]


def edit_json(rel: str, change: Callable[[Any], Any]) -> Damage:
    """Replace the JSON file ``rel`` by ``change(parsed)``."""

    def apply(store: Path) -> None:
        file = store / rel
        file.write_text(json.dumps(change(json.loads(file.read_text()))))

    return apply


def edit_field(rel: str, key: str, value: Any = None, *, drop: bool = False) -> Damage:
    """Set (or remove) one top-level field of a JSON file."""

    def change(obj: dict[str, Any]) -> dict[str, Any]:
        if drop:
            obj.pop(key)
        else:
            obj[key] = value
        return obj

    return edit_json(rel, change)


def edit_attr(key: str, value: Any = None, *, drop: bool = False) -> Damage:
    """Set (or remove) one chainyard attribute in the group's zarr.json."""

    def change(obj: dict[str, Any]) -> dict[str, Any]:
        attrs = obj["attributes"]["chainyard"]
        if drop:
            attrs.pop(key)
        else:
            attrs[key] = value
        return obj

    return edit_json("zarr.json", change)


def edit_meta(node: str, path: tuple[str, ...], value: Any) -> Damage:
    """Set one (nested) field of an array's zarr.json."""

    def change(obj: dict[str, Any]) -> dict[str, Any]:
        target = obj
        for key in path[:-1]:
            target = target[key]
        target[path[-1]] = value
        return obj

    return edit_json(f"{node}/zarr.json", change)


def every_array(make: Callable[[str], Damage]) -> Damage:
    """Apply ``make(node)`` to every per-step array."""

    def apply(store: Path) -> None:
        for node in (POS, LP, ACC, BLOB):
            make(node)(store)

    return apply


def write(rel: str, data: bytes) -> Damage:
    return lambda store: (store / rel).write_bytes(data)


def remove(rel: str) -> Damage:
    def apply(store: Path) -> None:
        target = store / rel
        shutil.rmtree(target) if target.is_dir() else target.unlink()

    return apply


def truncate(rel: str) -> Damage:
    def apply(store: Path) -> None:
        data = (store / rel).read_bytes()
        (store / rel).write_bytes(data[: len(data) // 2])

    return apply


def garble(rel: str) -> Damage:
    def apply(store: Path) -> None:
        n = (store / rel).stat().st_size
        (store / rel).write_bytes(bytes((i * 151 + 7) % 256 for i in range(n)))

    return apply


def flip(rel: str) -> Damage:
    """Flip one bit in the middle of a file (it may still decode, to other values)."""

    def apply(store: Path) -> None:
        data = bytearray((store / rel).read_bytes())
        data[len(data) // 2] ^= 0x10
        (store / rel).write_bytes(bytes(data))

    return apply


def pad_commit(store: Path) -> None:
    """commit.json grown past the metadata limit the case sets (valid JSON, trailing spaces)."""
    file = store / "commit.json"
    file.write_text(file.read_text() + " " * 300_000)


# ---------------------------------------------------------------------------- the catalogue
@dataclass(frozen=True)
class Case:
    """One damaged store and what every reader must answer.

    ``names``: text the error line must contain (the file or array). Exit statuses per command;
    None: the command is not run (its answer depends on what it happens to read).
    """

    damage: Damage
    names: str
    api: bool = True  # the Python API raises StoreError (False: every read succeeds)
    inspect: int | None = 4
    verify: int | None = 7
    diagnose: int | None = 4
    resume: int | None = 4
    extend: int | None = 4
    env: dict[str, str] = field(default_factory=dict)
    opens: bool = False  # Store.open succeeds (the damage is in chunks, found when read)


def chunk(node: str, i: int) -> str:
    return f"{node}/c/{i}/0/0" if node == POS else f"{node}/c/{i}/0"


#: chunk damage: inspect reads no chunk; diagnose reads positions and acceptance only
def chunk_case(damage: Damage, names: str, node: str, *, last: bool = True, **kw: Any) -> Case:
    return Case(
        damage,
        names,
        inspect=0,
        opens=True,
        diagnose=4 if node in (POS, ACC) else 0,
        resume=4 if last else kw.pop("resume", None),
        extend=4 if last else kw.pop("extend", None),
        **kw,
    )


C = "commit.json"
Z = "zarr.json"
CASES: dict[str, Case] = {
    # commit.json
    "commit is a JSON list": Case(write(C, b"[]"), C),
    "commit is not JSON": Case(write(C, b'{"steps_done": 3'), C),
    "commit is empty": Case(write(C, b""), C),
    "commit is not UTF-8": Case(write(C, b'{"steps_done": "\xff\xfe"}'), C),
    "commit missing": Case(remove(C), C),
    "steps_done a string": Case(edit_field(C, "steps_done", "abc"), "steps_done"),
    "steps_done negative": Case(edit_field(C, "steps_done", -5), "steps_done"),
    "steps_done fractional": Case(edit_field(C, "steps_done", 12.5), "steps_done"),
    "steps_done true": Case(edit_field(C, "steps_done", True), "steps_done"),
    "steps_done beyond capacity": Case(edit_field(C, "steps_done", 10**6), "steps_done"),
    "steps_done missing": Case(edit_field(C, "steps_done", drop=True), "steps_done"),
    "random_state missing": Case(edit_field(C, "random_state", drop=True), "random_state"),
    "random_state a list": Case(edit_field(C, "random_state", [1, 2]), "random_state"),
    "checksums missing": Case(edit_field(C, "checksums", drop=True), "checksums"),
    "checksums a list": Case(edit_field(C, "checksums", [1, 2]), "checksums"),
    "segments a string": Case(edit_field(C, "segments", "x"), "segments"),
    "integrity a string": Case(edit_field(C, "integrity", "x"), "integrity"),
    "commit over the metadata limit": Case(
        pad_commit,
        C,
        env={"CHAINYARD_MAX_METADATA_BYTES": "200000"},
        verify=4,  # a limit refuses to read at all (LimitExceededError), verify included
    ),
    # the group's zarr.json
    "group zarr.json truncated": Case(truncate(Z), Z),
    "group zarr.json missing": Case(remove(Z), Z),
    "group zarr.json garbage": Case(garble(Z), Z),
    "no chainyard attributes": Case(edit_json(Z, lambda o: {**o, "attributes": {}}), "attributes"),
    "format version 2": Case(edit_attr("format_version", 2), "format version"),
    "param_names 5": Case(edit_attr("param_names", 5), "param_names"),
    "param_names missing": Case(edit_attr("param_names", drop=True), "param_names"),
    "param_names empty": Case(edit_attr("param_names", []), "param_names"),
    "param_names repeated": Case(edit_attr("param_names", ["x", "x"]), "param_names"),
    "param_names one too many": Case(edit_attr("param_names", ["x", "y", "z"]), POS),
    "blob_names a string": Case(edit_attr("blob_names", "r2"), "blob_names"),
    "blob_names naming a missing array": Case(edit_attr("blob_names", ["r2", "q"]), "blob/q"),
    "walkers 0": Case(edit_attr("walkers", 0), "walkers"),
    "walkers a string": Case(edit_attr("walkers", "8"), "walkers"),
    "walkers missing": Case(edit_attr("walkers", drop=True), "walkers"),
    "walkers disagree with the arrays": Case(edit_attr("walkers", 9), POS),
    "replica negative": Case(edit_attr("replica", -1), "replica"),
    "config a list": Case(edit_attr("config", [1]), "config"),
    "identity a string": Case(edit_attr("identity", "x"), "identity"),
    "stored config invalid": Case(
        edit_json(
            Z,
            lambda o: o["attributes"]["chainyard"]["config"]["sampler"].update(walkers="many") or o,
        ),
        "config",  # the seal finds the edit first when rows are read
    ),
    # array metadata
    "position zarr.json truncated": Case(truncate(f"{POS}/{Z}"), POS),
    "position zarr.json garbage": Case(garble(f"{POS}/{Z}"), POS),
    "position zarr.json a list": Case(write(f"{POS}/{Z}", b"[1, 2]"), POS),
    "position zarr.json missing": Case(remove(f"{POS}/{Z}"), POS),
    "position array missing": Case(remove(POS), POS),
    "log_prob array missing": Case(remove(LP), LP),
    "blob array missing": Case(remove(BLOB), BLOB),
    "start position missing": Case(remove("start/position"), "start/position"),
    "position shape has 3 parameters": Case(edit_meta(POS, ("shape",), [300, 8, 3]), POS),
    "log_prob shape has 9 walkers": Case(edit_meta(LP, ("shape",), [300, 9]), LP),
    "blob shape has 3 axes": Case(edit_meta(BLOB, ("shape",), [300, 8, 1]), BLOB),
    "start log_prob shape wrong": Case(
        edit_meta("start/log_prob", ("shape",), [7]), "start/log_prob"
    ),
    "position shape negative": Case(edit_meta(POS, ("shape",), [-1, 8, 2]), POS),
    "accepted dtype float64": Case(edit_meta(ACC, ("data_type",), "float64"), ACC),
    "position dtype int32": Case(edit_meta(POS, ("data_type",), "int32"), POS),
    "position chunks split walkers": Case(
        edit_meta(POS, ("chunk_grid", "configuration", "chunk_shape"), [100, 4, 2]), POS
    ),
    "log_prob chunk steps disagree": Case(
        edit_meta(LP, ("chunk_grid", "configuration", "chunk_shape"), [50, 8]), LP
    ),
    "chunk steps 1e9 (over the chunk limit)": Case(
        every_array(
            lambda n: edit_meta(
                n,
                ("chunk_grid", "configuration", "chunk_shape"),
                [10**9, 8, 2][: 3 if n == POS else 2],
            )
        ),
        "CHAINYARD_MAX_CHUNK_BYTES",
        verify=4,  # a limit refuses to read at all (LimitExceededError), verify included
        opens=True,
    ),
    "chunk steps 500000 on every array": Case(
        every_array(
            lambda n: edit_meta(
                n,
                ("chunk_grid", "configuration", "chunk_shape"),
                [500000, 8, 2][: 3 if n == POS else 2],
            )
        ),
        POS,
        inspect=None,
        opens=True,
    ),
    "capacity below steps_done": Case(
        every_array(lambda n: edit_meta(n, ("shape",), [100, 8, 2][: 3 if n == POS else 2])),
        "steps_done",
    ),
    "unknown codec": Case(edit_meta(POS, ("codecs",), [{"name": "no-such-codec"}]), POS),
    "fill value garbage": Case(edit_meta(LP, ("fill_value",), {"a": 1}), LP),
    # chunks
    "last position chunk missing": chunk_case(remove(chunk(POS, 2)), f"{POS} chunk 2", POS),
    "middle log_prob chunk missing": chunk_case(
        remove(chunk(LP, 1)), f"{LP} chunk 1", LP, last=False, resume=4, extend=4
    ),
    "first blob chunk missing": chunk_case(
        remove(chunk(BLOB, 0)), f"{BLOB} chunk 0", BLOB, last=False, resume=4, extend=4
    ),
    "all accepted chunks missing": chunk_case(remove(f"{ACC}/c"), f"{ACC} chunk", ACC),
    "last position chunk truncated": chunk_case(truncate(chunk(POS, 2)), f"{POS} chunk 2", POS),
    "first position chunk garbage": chunk_case(
        garble(chunk(POS, 0)), f"{POS} chunk 0", POS, last=False
    ),
    "last log_prob chunk truncated": chunk_case(truncate(chunk(LP, 2)), f"{LP} chunk 2", LP),
    "last accepted chunk garbage": chunk_case(garble(chunk(ACC, 2)), f"{ACC} chunk 2", ACC),
    "middle accepted chunk empty": chunk_case(
        write(chunk(ACC, 1), b""), f"{ACC} chunk 1", ACC, last=False
    ),
    "start position chunk missing": Case(
        remove("start/position/c/0/0"), "start/position", inspect=0, diagnose=0, opens=True
    ),
    "start log_prob chunk truncated": Case(
        truncate("start/log_prob/c/0"), "start/log_prob", inspect=0, diagnose=0, opens=True
    ),
    # damage that still decodes (other values): every read compares the recorded checksums
    "last position chunk bit flip (pcodec rejects it)": chunk_case(
        flip(chunk(POS, 2)), f"{POS} chunk 2", POS
    ),
    "last log_prob chunk bit flip": Case(
        flip(chunk(LP, 2)), f"{LP} chunk 2", inspect=0, diagnose=0, opens=True
    ),
}


# ---------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def bases(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """A complete (300 steps) and a partial (250 of 300, killed) store, and their config."""
    root = tmp_path_factory.mktemp("corrupt")
    cfg = base_config(
        sampler={"walkers": 8, "steps": 300, "blobs": ["r2"]},
        storage={
            "chunk_steps": 100,
            "commit_every_steps": 50,
            "fsync": False,
            "commit_writer": "thread",
        },
    )
    config = write_run(root, cfg, BLOB_MODEL)
    res = cli("sample", str(config), "--out", "complete.zarr", "--progress", "off", cwd=root)
    assert res.returncode == 0, res.stderr
    env = {"CHAINYARD_TEST_KILL_AT": "commit-replaced:5"}
    res = cli(
        "sample", str(config), "--out", "partial.zarr", "--progress", "off", cwd=root, env=env
    )
    assert res.returncode == -9, res.stderr
    assert Store.open(root / "partial.zarr").steps_done == 250
    return {"config": config, "complete": root / "complete.zarr", "partial": root / "partial.zarr"}


def read_everything(path: Path) -> tuple[list[str], list[str]]:
    """Open ``path`` and call every read method; (ChainyardError lines, raw exceptions)."""
    errors: list[str] = []
    raw: list[str] = []

    def attempt(fn: Callable[[], Any]) -> Any:
        try:
            return fn()
        except ChainyardError as exc:
            errors.append(str(exc))
        except Exception as exc:
            raw.append(f"{type(exc).__name__}: {exc}"[:200])
        return None

    store = attempt(lambda: Store.open(path))
    if store is None:
        return errors, raw
    for call in (
        store.draws,
        lambda: store.column(0),
        lambda: store.column("y", 10, 20),
        store.log_prob,
        store.accepted,
        lambda: store.blob("r2"),
        store.last_state,
        store.start_state,
        lambda: store.read_rows("position", 0, store.capacity),
        lambda: store.read_rows("accepted", 0, store.steps_done, 7),
        lambda: [store.column(j, a, b) for a, b in store.iter_chunks() for j in (0, 1)],
        lambda: store.config,
    ):
        attempt(call)
    return errors, raw


def run_commands(
    case: Case, complete: Path, partial: Path, config: Path, only: tuple[str, ...]
) -> dict[str, Any]:
    """The CLI commands ``only`` of a case, run concurrently (independent stores or read-only)."""
    cwd = complete.parent
    commands = {
        "inspect": ["inspect", complete.name],
        "verify": ["verify", complete.name],
        "diagnose": ["diagnose", "--raw", complete.name],
        "resume": ["sample", str(config), "--out", partial.name, "--progress", "off"],
        "extend": ["sample", str(config), "--out", complete.name, "--steps", "400"],
    }
    # all at once: every command is expected to refuse before writing; one that writes is a
    # failure of its own case whatever the others then read
    env = {**os.environ, **case.env}
    procs = {
        name: subprocess.Popen(
            [sys.executable, "-m", "chainyard.cli", *commands[name]],
            cwd=cwd,
            env=env,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        for name in only
        if getattr(case, name) is not None
    }
    results = {}
    for name, proc in procs.items():
        out, err = proc.communicate(timeout=PATIENCE)
        results[name] = (proc.returncode, out, err)
    return results


#: near-duplicates of other cases: the Python API only (keeps the command-line part of this
#: file within its CI time share)
API_ONLY = {
    "commit is empty",
    "steps_done true",
    "steps_done missing",
    "random_state a list",
    "checksums a list",
    "param_names empty",
    "param_names repeated",
    "walkers missing",
    "replica negative",
    "identity a string",
    "group zarr.json garbage",
    "position zarr.json a list",
    "position zarr.json missing",
    "log_prob array missing",
    "blob shape has 3 axes",
    "position shape negative",
    "position dtype int32",
    "fill value garbage",
    "middle accepted chunk empty",
    "last log_prob chunk truncated",
    "steps_done fractional",
    "integrity a string",
    "no chainyard attributes",
    "format version 2",
    "blob_names a string",
    "config a list",
    "start log_prob shape wrong",
    "position zarr.json garbage",
    "walkers a string",
    "blob array missing",
    "stored config invalid",
    "steps_done negative",
    "log_prob shape has 9 walkers",
}


def damaged_copies(name: str, bases: dict[str, Path], tmp_path: Path) -> tuple[Path, Path]:
    """Copies of the complete and the partial store, both damaged as case ``name`` says."""
    complete, partial = tmp_path / "s.zarr", tmp_path / "p.zarr"
    shutil.copytree(bases["complete"], complete)
    shutil.copytree(bases["partial"], partial)
    CASES[name].damage(complete)
    CASES[name].damage(partial)
    return complete, partial


@pytest.mark.parametrize("name", list(CASES))
def test_python_api(
    name: str,
    bases: dict[str, Path],
    tmp_path: Path,
    tally: Tally,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Store.open and every read method give one StoreError line naming the damage, no other
    exception, and change nothing."""
    case = CASES[name]
    for key, value in case.env.items():
        monkeypatch.setenv(key, value)
    complete, _ = damaged_copies(name, bases, tmp_path)
    before = snapshot(complete)
    tally.fault()
    errors, raw = read_everything(complete)
    assert not raw, f"raw exceptions from the Python API: {raw}"
    if case.api:
        assert errors, "the Python API read a damaged store without an error"
        assert all(len(e.splitlines()) == 1 for e in errors), errors
        assert case.names in errors[0], errors[0]
    else:
        assert not errors, errors
    tally.assert_intact(before, complete, name)


def check_results(name: str, case: Case, results: dict[str, Any]) -> None:
    """Exit status, one ``chainyard: error:`` line naming the damage, no traceback."""
    for command, (code, out, err) in results.items():
        what = f"{command}: exit {code}\n{err[-2000:]}"
        assert "Traceback" not in err, what
        assert code == getattr(case, command), what
        lines = [line for line in err.splitlines() if line.startswith("chainyard: error:")]
        if code:
            assert len(lines) == 1 and len(err.strip().splitlines()) == 1, what
            assert case.names in lines[0] or case.names in out, what
        else:
            assert not lines, what


CLI_CASES = [n for n in CASES if n not in API_ONLY]


@pytest.mark.slow
@pytest.mark.parametrize("name", CLI_CASES)
def test_commands(name: str, bases: dict[str, Path], tmp_path: Path, tally: Tally) -> None:
    """inspect, diagnose, sample (resume, extend): the case's exit status, one
    ``chainyard: error:`` line naming the file or array, no traceback, nothing altered."""
    case = CASES[name]
    complete, partial = damaged_copies(name, bases, tmp_path)
    before = {p: snapshot(p) for p in (complete, partial)}
    tally.fault()
    only = ("inspect", "diagnose", "resume", "extend")
    check_results(name, case, run_commands(case, complete, partial, bases["config"], only))
    for path, snap in before.items():
        tally.assert_intact(snap, path, f"{name}: {path.name}")


@pytest.mark.slow
@pytest.mark.parametrize("name", CLI_CASES)
def test_verify(name: str, bases: dict[str, Path], tmp_path: Path, tally: Tally) -> None:
    """verify finds the damage: exit 7 (4 above a limit), one line naming it, nothing altered."""
    case = CASES[name]
    complete, partial = damaged_copies(name, bases, tmp_path)
    before = snapshot(complete)
    check_results(name, case, run_commands(case, complete, partial, bases["config"], ("verify",)))
    tally.assert_intact(before, complete, f"{name}: verify")


def test_catalogue_size() -> None:
    """The catalogue holds at least 40 damaged stores, each also run through the commands."""
    assert len(CASES) >= 40
    assert len(set(CASES) - API_ONLY) >= 40


def test_missing_chunk_is_not_read_as_fill(bases: dict[str, Path], tmp_path: Path) -> None:
    """A committed chunk that is missing is an error, never NaN rows (zarr's fill value)."""
    store = tmp_path / "s.zarr"
    shutil.copytree(bases["complete"], store)
    (store / chunk(POS, 1)).unlink()
    opened = Store.open(store)
    assert opened.draws(0, 100).shape == (100, 8, 2)  # other chunks still read
    with pytest.raises(StoreError, match=r"draws/position chunk 1 \(steps 100-199\) is missing"):
        opened.draws()


PEAK_CHILD = """
import resource, subprocess, sys
subprocess.run(sys.argv[1:], capture_output=True)
print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)
"""


def test_declared_chunk_size_allocates_nothing(bases: dict[str, Path], tmp_path: Path) -> None:
    """A declared chunk of 500,000 steps (64 MB, under the limit) over 100-step chunk files:
    reading it costs no more memory than reading the intact store (peak RSS, kB)."""
    store = tmp_path / "s.zarr"
    shutil.copytree(bases["complete"], store)
    CASES["chunk steps 500000 on every array"].damage(store)

    def peak(target: Path, command: str) -> int:
        args = [sys.executable, "-m", "chainyard.cli", command, str(target)]
        res = subprocess.run([sys.executable, "-c", PEAK_CHILD, *args], capture_output=True)
        return int(res.stdout.decode().strip())

    for command in ("verify", "inspect"):
        intact, damaged = peak(bases["complete"], command), peak(store, command)
        # a decoded chunk of 500000 x 8 x 2 float64 would add 64,000 kB
        assert damaged < intact + 20_000, (command, intact, damaged)


@pytest.mark.slow
def test_resume_check_accepts_rows_past_the_commit(
    bases: dict[str, Path], tmp_path: Path, tally: Tally
) -> None:
    """A run killed after rewriting its partial last chunk (rows past the commit, record not
    replaced) is not taken for damage: the resume check compares the committed rows, and the
    resumed store equals the uninterrupted one."""
    from tests.conftest import assert_same_store

    store = tmp_path / "p.zarr"
    shutil.copytree(bases["partial"], store)
    last = chunk(POS, 2)
    before = (store / last).read_bytes()
    env = {"CHAINYARD_TEST_KILL_AT": "chunks-written:1"}
    args = ("sample", str(bases["config"]), "--out", str(store), "--progress", "off")
    assert cli(*args, env=env).returncode == -9
    assert (store / last).read_bytes() != before  # the killed run rewrote the partial chunk
    assert Store.open(store).steps_done == 250
    res = cli(*args)
    assert res.returncode == 0, res.stderr
    assert_same_store(store, bases["complete"])
    tally.killed()
