"""Output safety of `derive` and the command line's one-line endings (real processes).

`derive --out` replaces only a derived chainyard store: never the source, a folder holding
it, the current folder, a user's folder or file, a sampled store or a path inside a store; a
second concurrent derive of the same output gets exit 6; a derive killed at any instant leaves
the previous or the new store complete and the rerun equals an uninterrupted derive. Then the
command line: usage errors, internal errors, storage faults, MemoryError, a closed stdout,
`check` evaluating the model, `diagnose --strict`, and record paths inside stores.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import chainyard
from tests.conftest import assert_same_store, base_config, cli, popen_cli, write_run
from tests.patience import PATIENCE
from tests.reliability.conftest import Tally, snapshot

pytestmark = pytest.mark.slow

#: derive with every step kept, decided here (no burn-in record)
DERIVE0 = ("derive", "--discard", "0")

VECTOR_MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * np.sum(theta * theta, axis=1)
"""

#: exact tail of every internal-error line
TRACEBACK_HINT = "run with --traceback or CHAINYARD_TRACEBACK=1 for the traceback)"


def one_error_line(res: subprocess.CompletedProcess[str], code: int) -> str:
    """Assert exit ``code`` and exactly one stderr line starting ``chainyard: ``; return it."""
    lines = res.stderr.splitlines()
    assert res.returncode == code, res.stderr
    assert len(lines) == 1, res.stderr
    assert lines[0].startswith("chainyard: "), res.stderr
    assert "Traceback" not in res.stderr
    return lines[0]


@pytest.fixture(scope="module")
def source(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A sampled store (16 walkers x 12,000 steps in 60 chunks) and a burn-in record."""
    folder = tmp_path_factory.mktemp("src")
    cfg = base_config(
        model={"log_prob": "model.py:log_prob", "vectorized": True},
        sampler={"walkers": 16, "steps": 12000},
        storage={"chunk_steps": 200, "fsync": False},
    )
    config = write_run(folder, cfg, model=VECTOR_MODEL)
    res = cli("sample", str(config), "--out", str(folder / "S.zarr"), "--progress", "off")
    assert res.returncode == 0, res.stderr
    res = cli("decide", "burn-in", str(folder / "S.zarr"), "--out", str(folder / "burn.json"))
    assert res.returncode == 0, res.stderr
    return folder / "S.zarr"


@pytest.fixture(scope="module")
def references(source: Path, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Uninterrupted derives: ``full`` (everything) and ``trimmed`` (burn-in record)."""
    folder = tmp_path_factory.mktemp("ref")
    record = source.parent / "burn.json"
    out = {"full": folder / "full.zarr", "trimmed": folder / "trimmed.zarr"}
    assert cli(*DERIVE0, str(source), "--out", str(out["full"])).returncode == 0
    res = cli("derive", str(source), "--out", str(out["trimmed"]), "--burn-in-record", str(record))
    assert res.returncode == 0, res.stderr
    return out


def same_derived(a: Path, b: Path) -> None:
    """Same rows, commit and derivation (apart from its creation time) as ``b``."""
    assert_same_store(a, b)
    da, db = chainyard.open_store(a).attrs["derived"], chainyard.open_store(b).attrs["derived"]
    for d in (da, db):
        d.pop("created_utc")
    assert da == db


def verify_ok(path: Path) -> None:
    """`chainyard verify` passes on ``path``."""
    res = cli("verify", str(path))
    assert res.returncode == 0, res.stdout + res.stderr


def leftovers(out: Path) -> list[str]:
    """Temporary siblings of ``out`` left by derives."""
    return sorted(p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}.derive-"))


# ------------------------------------------------------------------ refusals (exit 4)


def test_refuses_the_source_itself(source: Path, tally: Tally) -> None:
    """`derive S --out S` (also through another spelling of the path) refuses; S is intact."""
    before = snapshot(source)
    for out in (source, source.parent / "." / source.name):
        line = one_error_line(cli(*DERIVE0, str(source), "--out", str(out)), 4)
        assert line == (
            f"chainyard: error: {out}: refusing to write the derived store there: "
            "it is the source store"
        )
        tally.input()
    tally.assert_intact(before, source)


def test_refuses_a_folder_holding_the_source(source: Path, tally: Tally) -> None:
    """An --out that holds the source (its parent, grandparent) is refused; nothing removed."""
    before = snapshot(source.parent)
    for out in (source.parent, source.parent.parent):
        line = one_error_line(cli(*DERIVE0, str(source), "--out", str(out)), 4)
        assert line.endswith(
            f"refusing to write the derived store there: it holds the source store {source}"
        )
        tally.input()
    tally.assert_intact(before, source.parent)


def test_refuses_a_path_inside_the_source(source: Path, tally: Tally) -> None:
    """An --out inside the source store is refused and creates nothing there."""
    before = snapshot(source)
    line = one_error_line(cli(*DERIVE0, str(source), "--out", str(source / "draws" / "x")), 4)
    assert line.endswith(f"it is inside the source store {source}")
    assert not (source / "draws" / "x").exists()
    tally.input()
    tally.assert_intact(before, source)


def test_refuses_the_current_folder(source: Path, tmp_path: Path, tally: Tally) -> None:
    """`derive ../S --out .` (and `--out ..` one level deeper) refuses; user files stay."""
    work = tmp_path / "work"
    (work / "sub").mkdir(parents=True)
    (work / "notes.txt").write_text("mine\n")
    (work / "sub" / "data.csv").write_text("a,b\n1,2\n")
    before = snapshot(work)
    line = one_error_line(cli(*DERIVE0, str(source), "--out", ".", cwd=work), 4)
    assert line == (
        "chainyard: error: .: refusing to write the derived store there: it is the current folder"
    )
    line = one_error_line(cli(*DERIVE0, str(source), "--out", "..", cwd=work / "sub"), 4)
    assert line.endswith("it holds the current folder")
    tally.input(2)
    tally.assert_intact(before, work)


def test_refuses_a_user_folder_and_a_user_file(source: Path, tmp_path: Path, tally: Tally) -> None:
    """A folder with a user's thesis.tex, an empty folder and a file are refused, untouched."""
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "thesis.tex").write_text("\\documentclass{article}\n")
    (tmp_path / "empty").mkdir()
    (tmp_path / "notes.txt").write_text("x\n")
    before = snapshot(tmp_path)
    for name, why in (
        ("mine", "it exists and is not a derived chainyard store"),
        ("empty", "it exists and is not a derived chainyard store"),
        ("notes.txt", "a file of that name exists"),
    ):
        out = tmp_path / name
        line = one_error_line(cli(*DERIVE0, str(source), "--out", str(out)), 4)
        assert line == (
            f"chainyard: error: {out}: refusing to write the derived store there: "
            f"{why} (only a derived store is replaced; choose another path)"
        )
        tally.input()
    tally.assert_intact(before, tmp_path)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["empty", "mine", "notes.txt"]


def test_refuses_a_sampled_store(source: Path, tmp_path: Path, tally: Tally) -> None:
    """A sampled store at --out (even a copy of the source) is refused, byte-identical after."""
    other = tmp_path / "other.zarr"
    res = cli(*DERIVE0, str(source), "--out", str(tmp_path / "d.zarr"))
    assert res.returncode == 0, res.stderr
    shutil.copytree(source, other)  # a sampled store that is not the source
    before = snapshot(other)
    line = one_error_line(cli(*DERIVE0, str(source), "--out", str(other)), 4)
    assert line.endswith(
        "it is a sampled store, not a derived one (only a derived store is "
        "replaced; choose another path)"
    )
    line = one_error_line(cli(*DERIVE0, str(source), "--out", str(other / "inner")), 4)
    assert line.endswith(f"it is inside the chainyard store {other}")
    tally.input(2)
    tally.assert_intact(before, other)


def test_replaces_a_derived_store(
    source: Path, references: dict[str, Path], tmp_path: Path, tally: Tally
) -> None:
    """An existing derived store is replaced by the new one (also through a symlink)."""
    out = tmp_path / "d.zarr"
    before = snapshot(source)
    assert cli(*DERIVE0, str(source), "--out", str(out)).returncode == 0
    same_derived(out, references["full"])
    record = source.parent / "burn.json"
    link = tmp_path / "link.zarr"
    link.symlink_to(out)
    res = cli("derive", str(source), "--out", str(link), "--burn-in-record", str(record))
    assert res.returncode == 0, res.stderr
    assert link.is_symlink()
    same_derived(out, references["trimmed"])
    verify_ok(out)
    assert leftovers(out) == []
    tally.assert_intact(before, source)


# ------------------------------------------------------------------ one writer (exit 6)


def _wait_for(cond, seconds: float = PATIENCE) -> None:  # type: ignore[no-untyped-def]
    end = time.monotonic() + seconds
    while not cond():
        assert time.monotonic() < end, "timed out"
        time.sleep(0.005)


def _stopped(pid: int) -> bool:
    """True while process ``pid`` is stopped by a signal (state T in /proc)."""
    try:
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0] == "T"
    except OSError:
        return False


def test_second_derive_of_the_same_output_exits_6(
    source: Path, references: dict[str, Path], tmp_path: Path, tally: Tally
) -> None:
    """While one derive writes (it stops itself, written but not yet published, holding the
    lock), a second gets exit 6 in one line."""
    out = tmp_path / "d.zarr"
    env = {"CHAINYARD_TEST_STOP_AT": "derive-before-publish"}
    first = popen_cli(*DERIVE0, str(source), "--out", str(out), env=env)
    try:
        _wait_for(lambda: _stopped(first.pid) or first.poll() is not None)
        assert first.poll() is None, first.communicate()[1]
        assert leftovers(out) != []
        second = cli(*DERIVE0, str(source), "--out", str(out))
        line = one_error_line(second, 6)
        assert "another process is writing" in line and str(out) in line
    finally:
        os.kill(first.pid, signal.SIGCONT)
    _, err = first.communicate(timeout=PATIENCE)
    assert first.returncode == 0, err
    same_derived(out, references["full"])
    verify_ok(out)
    tally.input()


def test_concurrent_derives_leave_one_complete_output(
    source: Path, references: dict[str, Path], tmp_path: Path
) -> None:
    """Two derives started together: each ends 0 or 6 (one line), the output verifies."""
    out = tmp_path / "d.zarr"
    for _ in range(2):
        procs = [popen_cli(*DERIVE0, str(source), "--out", str(out)) for _ in range(2)]
        codes = []
        for p in procs:
            _, err = p.communicate(timeout=PATIENCE)
            codes.append(p.returncode)
            assert p.returncode in (0, 6), err
            assert "Traceback" not in err
            if p.returncode == 6:
                assert len(err.splitlines()) == 1 and "another process is writing" in err
        assert 0 in codes
        same_derived(out, references["full"])
    verify_ok(out)
    assert leftovers(out) == []


# ------------------------------------------------------------------ kills


def test_kill_before_publish_keeps_the_old_store(
    source: Path, references: dict[str, Path], tmp_path: Path, tally: Tally
) -> None:
    """SIGKILL at derive-before-publish keeps the old store whole; the rerun swaps in the new."""
    out = tmp_path / "d.zarr"
    record = str(source.parent / "burn.json")
    before = snapshot(source)
    res = cli(
        "derive",
        "--discard",
        "0",
        str(source),
        "--out",
        str(tmp_path / "fresh.zarr"),
        env={"CHAINYARD_TEST_KILL_AT": "derive-before-publish"},
    )
    assert res.returncode == -signal.SIGKILL
    assert not (tmp_path / "fresh.zarr").exists()
    assert cli(*DERIVE0, str(source), "--out", str(out)).returncode == 0
    old = snapshot(out)
    res = cli(
        "derive",
        str(source),
        "--out",
        str(out),
        "--burn-in-record",
        record,
        env={"CHAINYARD_TEST_KILL_AT": "derive-before-publish"},
    )
    assert res.returncode == -signal.SIGKILL
    tally.assert_intact(old, out, "the previous derived store")
    assert leftovers(out) != []
    res = cli("derive", str(source), "--out", str(out), "--burn-in-record", record)
    assert res.returncode == 0, res.stderr
    same_derived(out, references["trimmed"])
    assert leftovers(out) == []
    verify_ok(out)
    res = cli(*DERIVE0, str(source), "--out", str(tmp_path / "fresh.zarr"))
    assert res.returncode == 0
    assert leftovers(tmp_path / "fresh.zarr") == []
    tally.assert_intact(before, source)
    tally.killed(2)


def test_random_kills_leave_old_or_new_store(
    source: Path, references: dict[str, Path], tmp_path: Path, tally: Tally
) -> None:
    """SIGKILL at random times: the output is always the old or the new store, complete."""
    rng = np.random.default_rng(20261202)
    out = tmp_path / "d.zarr"
    record = str(source.parent / "burn.json")
    before = snapshot(source)
    started = time.monotonic()
    assert cli(*DERIVE0, str(source), "--out", str(out)).returncode == 0
    span = time.monotonic() - started
    kills = tries = 0
    while kills < 3 and tries < 20:  # a derive that beat its kill (a change of load) is retried
        tries += 1
        now = "trimmed" if chainyard.open_store(out).attrs["derived"]["discard"] else "full"
        swap = ["--burn-in-record", record] if now == "full" else ["--discard", "0"]
        proc = popen_cli("derive", str(source), "--out", str(out), *swap)
        time.sleep(float(rng.uniform(0.3, 1.1)) * span)
        if proc.poll() is None:
            proc.kill()
            kills += 1
        proc.communicate(timeout=PATIENCE)
        after = "trimmed" if chainyard.open_store(out).attrs["derived"]["discard"] else "full"
        same_derived(out, references[after])  # the old or the new store, complete
    assert kills >= 3, f"only {kills} of {tries} derives were still running when killed"
    res = cli("derive", str(source), "--out", str(out), "--burn-in-record", record)
    assert res.returncode == 0, res.stderr
    same_derived(out, references["trimmed"])
    assert leftovers(out) == []
    verify_ok(out)
    tally.assert_intact(before, source)
    tally.killed(kills)


# ------------------------------------------------------------------ the command line


@pytest.mark.parametrize(
    ("args", "line"),
    [
        (
            ["sample", "run.yaml"],
            "the following arguments are required: --out (see chainyard sample --help)",
        ),
        (
            ["sample", "run.yaml", "--out", "s.zarr", "--steps", "0"],
            "argument --steps: must be >= 1, got 0 (see chainyard sample --help)",
        ),
        (
            ["sample", "run.yaml", "--out", "s.zarr", "--steps", "1e3"],
            "argument --steps: must be a whole number >= 1, got '1e3' "
            "(see chainyard sample --help)",
        ),
        (
            ["sample", "run.yaml", "--out", "s.zarr", "--replica", "-1"],
            "argument --replica: must be >= 0, got -1 (see chainyard sample --help)",
        ),
        (
            ["sample", "run.yaml", "--out", "s.zarr", "--progress-interval", "nan"],
            "argument --progress-interval: must be a finite number of seconds > 0, got nan "
            "(see chainyard sample --help)",
        ),
        (
            ["sample", "run.yaml", "--out", "s.zarr", "--progress", "loud"],
            "argument --progress: invalid choice: 'loud' (choose from 'auto', 'bar', 'log', 'off') "
            "(see chainyard sample --help)",
        ),
        (
            ["frobnicate"],
            "argument COMMAND: invalid choice: 'frobnicate' (choose from 'sample', "
            "'decide', 'derive', 'diagnose', 'check', 'schema', 'export', 'results-table', "
            "'plot', 'verify', 'inspect', 'pack', 'unpack', 'export-prov', 'publish', 'status') "
            "(see chainyard --help)",
        ),
        ([], "the following arguments are required: COMMAND (see chainyard --help)"),
        (
            ["derive", "S.zarr", "--out", "d", "--bogus"],
            "unrecognized arguments: --bogus (see chainyard --help)",
        ),
    ],
)
def test_usage_errors_are_one_line(run_dir: Path, args: list[str], line: str, tally: Tally) -> None:
    """Command-line misuse: one line `chainyard: error: ... (see ... --help)`, exit 2."""
    assert one_error_line(cli(*args, cwd=run_dir), 2) == f"chainyard: error: {line}"
    assert not (run_dir / "s.zarr").exists()
    tally.input()


def _inject(
    body: str, *args: str, env: dict[str, str] | None = None
) -> subprocess.CompletedProcess[str]:
    """Run the real `main` with `schema` replaced by ``body`` (a fault no input can cause)."""
    code = (
        "import sys, chainyard.cli as c, chainyard.commands.configuration as s\n"
        f"def broken(args):\n    {body}\n"
        "s._cmd_schema = broken\n"
        "sys.exit(c.main(sys.argv[1:]))\n"
    )
    return subprocess.run(
        [sys.executable, "-c", code, *args],
        capture_output=True,
        text=True,
        timeout=PATIENCE,
        env={**os.environ, **(env or {})},
    )


def test_internal_error_is_one_line_and_traceback_on_request(tally: Tally) -> None:
    """A bug ends in one `internal error` line, exit 70; --traceback or the variable show it."""
    expected = (
        "chainyard: internal error: KeyError: 'boom' (in 'chainyard schema'; " + TRACEBACK_HINT
    )
    assert one_error_line(_inject("return {}['boom']", "schema"), 70) == expected
    for res in (
        _inject("return {}['boom']", "--traceback", "schema"),
        _inject("return {}['boom']", "schema", "--traceback"),
        _inject("return {}['boom']", "schema", env={"CHAINYARD_TRACEBACK": "1"}),
    ):
        assert res.returncode == 70
        assert res.stderr.startswith("Traceback (most recent call last):")
        assert res.stderr.splitlines()[-1] == expected
    tally.fault(4)


def test_memory_error_is_one_line(tally: Tally) -> None:
    """MemoryError ends in one line naming the command, exit 70."""
    line = one_error_line(_inject("raise MemoryError()", "schema"), 70)
    assert line == (
        "chainyard: error: 'chainyard schema' ran out of memory (MemoryError); free "
        "memory or lower the sizes involved (steps, walkers, chunk_steps)"
    )
    tally.fault()


def test_storage_fault_that_escapes_is_one_line(tally: Tally) -> None:
    """A write to a full device (/dev/full: ENOSPC, Linux) ends in one line, exit 8."""
    if not Path("/dev/full").exists():
        pytest.skip("/dev/full is Linux-only")
    line = one_error_line(cli("schema", "--output", "/dev/full"), 8)
    assert line == (
        "chainyard: error: /dev/full: the file system refused: no space left on the "
        "device (ENOSPC); free some space and rerun"
    )
    tally.fault()


def test_closed_stdout_ends_quietly(source: Path) -> None:
    """`chainyard inspect ... | head -0`: the reader is gone; exit 0 and nothing on stderr."""
    for args in (["schema"], ["inspect", str(source), "--json"]):
        proc = subprocess.Popen(
            [sys.executable, "-m", "chainyard.cli", *args],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
        )
        assert proc.stdout is not None and proc.stderr is not None
        proc.stdout.close()  # like `| head -0`: the reader exits before chainyard writes
        err = proc.stderr.read().decode()
        assert proc.wait(timeout=PATIENCE) == 0, err
        assert err == ""


def test_check_evaluates_the_model_at_the_initial_positions(tmp_path: Path, tally: Tally) -> None:
    """`check` prints the log-prob range at replica 0's start; a wrong shape is exit 3."""
    config = write_run(tmp_path / "good", base_config(sampler={"walkers": 16, "steps": 10}))
    res = cli("check", str(config))
    assert res.returncode == 0, res.stderr
    store = tmp_path / "s.zarr"
    assert cli("sample", str(config), "--out", str(store), "--progress", "off").returncode == 0
    start = chainyard.open_store(store).start_state()["position"]
    # analytic: log_prob = -0.5 |theta|^2 for the standard-normal model
    lp = -0.5 * np.sum(start * start, axis=1)
    assert res.stdout.strip() == (
        f"{config}: valid (2 parameters, 16 walkers, 10 steps); model evaluated at replica 0's "
        f"16 initial positions: log_prob from {lp.min():.6g} to {lp.max():.6g}"
    )
    bad = write_run(tmp_path / "bad", model="def log_prob(theta, data):\n    return [1.0, 2.0]\n")
    line = one_error_line(cli("check", str(bad)), 3)
    assert line.startswith("chainyard: error: model.log_prob returned ")
    missing = write_run(
        tmp_path / "missing", model="def log_prob(theta, data):\n    return data['y'].sum()\n"
    )
    assert cli("check", str(missing)).returncode == 3
    typo = write_run(tmp_path / "typo", base_config(sampler={"walkers": 16, "stepz": 10}))
    assert one_error_line(cli("check", str(typo)), 2).startswith("chainyard: error: ")
    tally.input(3)


def test_diagnose_strict_targets_not_met_exit_1(source: Path) -> None:
    """`diagnose --strict` with targets out of reach: the table, then one line, exit 1."""
    cfg = chainyard.open_store(source).attrs["config"]
    cfg["targets"] = {"min_ess_bulk": 10_000_000}
    config = source.parent / "strict.yaml"
    config.write_text(json.dumps(cfg))
    res = cli("diagnose", str(source), "--raw", "--config", str(config), "--strict")
    assert res.returncode == 1, res.stderr
    assert len(res.stderr.splitlines()) == 1
    assert res.stderr.startswith("chainyard: error: targets not met for ")
    assert res.stderr.rstrip().endswith("see the table above (--strict)")
    assert "Diagnostics can show non-convergence" in res.stdout


def test_records_refuse_paths_in_stores(source: Path, tmp_path: Path, tally: Tally) -> None:
    """decide --out / diagnose --json naming a store or a path inside one: exit 4, untouched."""
    before = snapshot(source)
    cases = [
        ("decide", "burn-in", str(source), "--out", str(source / "commit.json")),
        ("decide", "thinning", str(source), "--out", str(source / "new" / "t.json")),
        ("diagnose", str(source), "--json", str(source)),
        ("diagnose", str(source), "--json", str(source / "diagnostics.json")),
    ]
    for args in cases:
        line = one_error_line(cli(*args), 4)
        assert "is a store" in line or f"is inside the store {source}" in line
        tally.input()
    tally.assert_intact(before, source)
    assert not (source / "new").exists() and not (source / "diagnostics.json").exists()
