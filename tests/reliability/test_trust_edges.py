"""Issue 18, the edge items: each test is a reproduction from the outside trial.

Real ``chainyard`` processes on real stores; exit statuses are the documented table in
chainyard.errors; "one line" is the project's rule for user-facing errors.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

import chainyard
from tests.conftest import base_config, cli, write_run
from tests.patience import PATIENCE, patient
from tests.reliability.conftest import Tally, snapshot

TINY = base_config(
    sampler={"walkers": 8, "steps": 60},
    storage={"chunk_steps": 16, "commit_every_steps": 20},
)


def _one_error(stderr: str) -> str:
    """The single ``chainyard: error:`` line of ``stderr`` (no traceback)."""
    assert "Traceback" not in stderr, stderr
    lines = [ln for ln in stderr.splitlines() if ln.startswith("chainyard: error: ")]
    assert len(lines) == 1, stderr
    return lines[0]


# ------------------------------------------------------------ item 8: --workers is capped
def test_workers_capped_at_cpus(tmp_path: Path, tally: Tally) -> None:
    """``--workers 12 --cpus 2`` starts 2 workers and says so in one line."""
    cfg = write_run(tmp_path, TINY)
    res = cli(
        "sample",
        str(cfg),
        "--out",
        str(tmp_path / "s.zarr"),
        "--progress",
        "log",
        "--workers",
        "12",
        "--cpus",
        "2",
    )
    tally.input()
    assert res.returncode == 0, res.stderr
    capped = [ln for ln in res.stderr.splitlines() if "capped at 2" in ln]
    assert len(capped) == 1, res.stderr
    assert "12 asked for" in capped[0]
    assert "in 2 worker processes" in res.stderr, res.stderr


@pytest.mark.parametrize(
    "args",
    [("--workers", "100000"), ("--workers", "1025"), ("--workers", "2", "--cpus", "100000")],
    ids=["workers-100000", "workers-1025", "cpus-100000"],
)
def test_absurd_worker_counts_refused(args: tuple[str, ...], tmp_path: Path, tally: Tally) -> None:
    """Absurd counts exit 2 with one line naming the option, before any process starts."""
    cfg = write_run(tmp_path, TINY)
    res = cli("sample", str(cfg), "--out", str(tmp_path / "s.zarr"), *args)
    tally.input()
    assert res.returncode == 2, res.stderr
    line = _one_error(res.stderr)
    assert ("workers" in line or "cpus" in line) and "1024" in line, line
    assert not (tmp_path / "s.zarr").exists()


# ------------------------------------------- item 7: SIGTERM, model stuck in compiled code
#: a standard-normal model that, when "regex.flag" exists in the working folder, announces
#: itself after 300 calls and runs a catastrophic regular expression (2**40 backtracking
#: steps inside the re module's C code, which holds the interpreter lock)
REGEX_MODEL = """
import os
import re
import numpy as np

CALLS = [0]

def log_prob(theta, data):
    CALLS[0] += 1
    if CALLS[0] > 300 and os.path.exists("regex.flag"):
        open("stuck.flag", "w").close()
        re.match(r"(a+)+$", "a" * 40 + "b")
    return -0.5 * float(np.dot(theta, theta))
"""


@pytest.mark.slow
def test_sigterm_with_model_stuck_in_compiled_code(tmp_path: Path, tally: Tally) -> None:
    """SIGTERM stops a serial run stuck in a catastrophic regex within the grace period
    (exit 143, one line), and the last commit is intact."""
    from chainyard.engine.stopping import STOP_GRACE_SECONDS

    cfg = base_config(
        sampler={"walkers": 8, "steps": 400},
        storage={"chunk_steps": 16, "commit_every_steps": 8},
    )
    write_run(tmp_path, cfg, REGEX_MODEL)
    (tmp_path / "regex.flag").touch()
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "chainyard.cli",
            "sample",
            "run.yaml",
            "--out",
            "s.zarr",
            "--progress",
            "off",
        ],
        cwd=tmp_path,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        deadline = time.monotonic() + PATIENCE
        while not (tmp_path / "stuck.flag").exists():
            assert proc.poll() is None and time.monotonic() < deadline, "model never got stuck"
            time.sleep(0.02)
        sent = time.monotonic()
        proc.send_signal(signal.SIGTERM)
        # part of what is tested: the run stops, where the regex alone would run for hours
        # (2**40 steps). The bound allows for a loaded machine yet stays far below that.
        stop_bound = STOP_GRACE_SECONDS + patient(40)
        try:
            _, err = proc.communicate(timeout=stop_bound)
        except subprocess.TimeoutExpired:
            pytest.fail(f"still running {stop_bound:g} s after SIGTERM")
        took = time.monotonic() - sent
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    tally.fault()
    assert proc.returncode == 128 + signal.SIGTERM, err
    assert took >= STOP_GRACE_SECONDS - 0.5, took
    lines = [x for x in err.strip().splitlines() if "stopped by SIGTERM" in x]
    assert len(lines) == 1, err
    assert f"still running {STOP_GRACE_SECONDS:g} s after the signal" in lines[0], err
    # a commit handed to a writer thread may only finish once the regex is interrupted (the
    # regex holds the interpreter lock): the store holds that commit, whole and verified
    res = cli("verify", str(tmp_path / "s.zarr"))
    assert res.returncode == 0, res.stdout + res.stderr
    assert chainyard.open_store(tmp_path / "s.zarr").steps_done >= 8


# ------------------------------------------------ item 16: envelope errors in one line
def _envelope_config(envelope: object) -> dict[str, object]:
    cfg = base_config(
        parameters=[
            {"name": n, "init": {"normal": {"loc": 0.0, "scale": 1.0}}} for n in ("a", "b", "c")
        ],
    )
    cfg["sampler"] = {"kind": "accept_reject", "envelope": envelope, "log_bound": 1.0, "draws": 10}
    return cfg


NORMAL = {"normal": {"loc": 0.0, "scale": 1.0}}


@pytest.mark.parametrize(
    ("envelope", "expected"),
    [
        (
            [NORMAL, NORMAL, {"normal": {"loc": 0.0, "scale": -1.0}}],
            "sampler.envelope[2].normal.scale = -1.0: ",
        ),
        ([NORMAL, {"gamma": 1}, NORMAL], "sampler.envelope[1] = {'gamma': 1}: must be exactly one"),
        ([NORMAL, {**NORMAL, "x": 1}, NORMAL], "sampler.envelope[1] = "),
        (5, "sampler.envelope = 5: must be one {normal: {loc, scale}} or {uniform"),
        ({"uniform": {"low": 0.0, "high": 1.0, "mid": 2}}, "sampler.envelope.uniform.mid: unknown"),
    ],
    ids=["scale", "kind", "extra-key", "not-a-mapping", "single-extra"],
)
def test_envelope_errors_in_one_line(
    envelope: object, expected: str, tmp_path: Path, tally: Tally
) -> None:
    """A wrong envelope entry is one line in our words (no pydantic union names), exit 2."""
    cfg = write_run(tmp_path, _envelope_config(envelope))
    res = cli("check", str(cfg))
    tally.input()
    assert res.returncode == 2, res.stderr
    line = _one_error(res.stderr)
    assert expected in line, line
    for leak in ("tagged-union", "tuple[", "Envelope", ".one", ".list"):
        assert leak not in line, line


# ----------------------------- item 14: --until-targets needs its extend_until_targets section
def test_until_targets_without_its_section_refused(tmp_path: Path, tally: Tally) -> None:
    """Without ``extend_until_targets`` (the budget), ``--until-targets`` exits 2 in one line
    naming the section, and the store is neither created nor extended."""
    cfg = write_run(tmp_path, TINY)
    out = tmp_path / "s.zarr"
    res = cli("sample", str(cfg), "--out", str(out), "--until-targets")
    tally.input()
    assert res.returncode == 2, res.stderr
    assert "extend_until_targets: required by --until-targets" in _one_error(res.stderr)
    assert not out.exists()
    assert cli("sample", str(cfg), "--out", str(out)).returncode == 0
    before = snapshot(out)
    res = cli("sample", str(cfg), "--out", str(out), "--until-targets")
    assert res.returncode == 2, res.stderr
    tally.assert_intact(before, out)


# ------------------------------------------- item 4: no code from a store without opt-in
def _craft_code_store(store: Path, marker: Path) -> None:
    """Put a model that writes ``marker`` at import inside ``store``, point the stored config
    at it with ``config_dir`` = the store's folder name (relative), and reseal the store."""
    import hashlib
    import json

    from chainyard.config import config_hash
    from chainyard.store import Store
    from chainyard.store.integrity import seal_record

    evil = store / "evilmodel.py"
    evil.write_text(
        f"open({str(marker)!r}, 'w').write('imported')\n"
        "import numpy as np\n\n\n"
        "def log_prob(theta, data):\n    return -0.5 * float(np.dot(theta, theta))\n"
    )
    meta = json.loads((store / "zarr.json").read_text())
    attrs = meta["attributes"]["chainyard"]
    attrs["config"]["model"]["log_prob"] = "evilmodel.py:log_prob"
    attrs["config_hash"] = config_hash(attrs["config"])
    attrs["config_dir"] = store.name
    digest = hashlib.sha256(evil.read_bytes()).hexdigest()
    attrs["identity"]["model_source"] = {"path": "evilmodel.py", "sha256": digest}
    (store / "zarr.json").write_text(json.dumps(meta))
    opened = Store.open(store)
    record = seal_record(opened, dict(opened.commit_record), {})
    opened.close()
    (store / "commit.json").write_text(json.dumps(record))


def test_replay_never_runs_code_from_a_store_without_opt_in(tmp_path: Path, tally: Tally) -> None:
    """A store carrying its own model (config_dir = its folder name, resealed): ``verify``
    names the file chainyard did not write; ``verify --replay`` beside it imports nothing: a
    relative config_dir is never resolved against the current folder, code inside the store
    needs --run-stored-code, and even then a file chainyard did not write is refused."""
    work, victim = tmp_path / "work", tmp_path / "victim"
    cfg = write_run(work, TINY)
    assert cli("sample", str(cfg), "--out", str(work / "s.zarr")).returncode == 0
    victim.mkdir()
    store = victim / "s.zarr"
    shutil.copytree(work / "s.zarr", store)
    marker = victim / "imported.txt"
    _craft_code_store(store, marker)
    res = cli("verify", "s.zarr", cwd=victim)  # the seal holds; the stray file is named
    assert res.returncode == 7 and "evilmodel.py: unknown file" in res.stderr, res.stderr
    res = cli("verify", "s.zarr", "--replay", "5", cwd=victim)
    tally.input()
    assert res.returncode == 2, res.stdout + res.stderr
    line = _one_error(res.stderr)
    assert "config_dir 's.zarr' is not an absolute path" in line and "--sources" in line, line
    assert not marker.exists()
    res = cli("verify", "s.zarr", "--replay", "5", "--sources", "s.zarr", cwd=victim)
    tally.input()
    assert res.returncode == 2, res.stdout + res.stderr
    line = _one_error(res.stderr)
    assert "would import and run code stored inside it" in line, line
    assert "evilmodel.py:log_prob" in line and "--run-pack-code" in line, line
    assert not marker.exists()
    res = cli(
        "verify",
        "s.zarr",
        "--replay",
        "5",
        "--sources",
        "s.zarr",
        "--run-stored-code",
        cwd=victim,
    )
    # even with the opt-in, a file chainyard did not write fails verification before any replay
    assert res.returncode == 7 and "evilmodel.py: unknown file" in res.stderr, res.stderr
    assert not marker.exists()


# ------------------------- items 6 and 13: exports on a full disk, and killed exports' leftovers
EXPORT_RUN = base_config(
    sampler={"walkers": 16, "steps": 600},
    storage={"chunk_steps": 128, "commit_every_steps": 300},
)


@pytest.fixture(scope="module")
def export_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A sampled store whose netCDF export is ~0.4 MB."""
    folder = tmp_path_factory.mktemp("export")
    cfg = write_run(folder, EXPORT_RUN)
    res = cli("sample", str(cfg), "--out", str(folder / "s.zarr"))
    assert res.returncode == 0, res.stderr
    return folder / "s.zarr"


def test_netcdf_export_past_file_size_limit(export_store: Path, tmp_path: Path, tally: Tally):  # type: ignore[no-untyped-def]
    """``ulimit -f 64`` (64 KiB): exit 8, one line, no HDF5 output, nothing left behind."""
    from tests.reliability.faults import assert_one_error, fsize_limit, run

    out = tmp_path / "run.nc"
    res = run("export", str(export_store), "--raw", "-o", str(out), preexec_fn=fsize_limit(65536))
    tally.fault()
    assert_one_error(res, 8, str(out), "ulimit -f")
    assert "HDF5" not in res.stderr, res.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == []


def test_netcdf_export_on_a_full_disk(export_store: Path, tmp_path: Path, tally: Tally):  # type: ignore[no-untyped-def]
    """A file system with 64 KiB free: exit 8, one line, nothing left behind."""
    from tests.reliability.faults import assert_one_error, fill, run, tmpfs

    with tmpfs(tmp_path / "disk", 1024) as disk:
        filler = fill(disk, 65536)
        out = disk / "run.nc"
        res = run("export", str(export_store), "--raw", "-o", str(out))
        tally.fault()
        assert_one_error(res, 8, str(out), "free")
        assert sorted(p.name for p in disk.iterdir()) == [filler.name]


def test_killed_export_leftovers_removed_by_the_next(
    export_store: Path, tmp_path: Path, tally: Tally
) -> None:
    """A ``.NAME.export-PID.tmp`` of a process that has ended (a killed export) is removed
    by the next export of NAME; one of a live process is left alone."""
    for ext in ("nc", "csv", "zarr"):
        out = tmp_path / f"run.{ext}"
        dead = subprocess.Popen([sys.executable, "-c", "pass"])
        dead.wait()
        stale = tmp_path / f".run.{ext}.export-{dead.pid}.tmp"
        if ext == "zarr":
            stale.mkdir()
            (stale / "zarr.json").write_text("{}")
        else:
            stale.write_bytes(b"\0" * 4096)
        live = tmp_path / f".run.{ext}.export-{os.getppid()}.tmp"
        live.write_bytes(b"")
        res = cli("export", str(export_store), "--raw", "-o", str(out))
        tally.fault()
        assert res.returncode == 0, res.stderr
        assert out.exists() and not stale.exists()
        assert live.exists()
        live.unlink()


# ------------------------------- item 17 (sample/unpack half): --out inside a store refused
def test_sample_and_unpack_out_inside_a_store_refused(tmp_path: Path, tally: Tally) -> None:
    """``sample --out`` and ``unpack --out`` inside an existing store exit 4 in one line naming
    that store, and the store is left byte for byte as it was."""
    cfg = write_run(tmp_path, TINY)
    store = tmp_path / "s.zarr"
    assert cli("sample", str(cfg), "--out", str(store)).returncode == 0
    res = cli("pack", str(store), "--out", str(tmp_path / "p.zip"))
    assert res.returncode == 0, res.stderr
    before = snapshot(store)
    attempts = [
        ("sample", str(cfg), "--out", str(store / "inner.zarr")),
        ("sample", str(cfg), "--out", str(store / "draws" / "x.zarr")),
        ("unpack", str(tmp_path / "p.zip"), "--out", str(store / "u.zarr")),
        ("unpack", str(tmp_path / "p.zip"), "--out", str(store / "draws" / "u.zarr")),
    ]
    for args in attempts:
        res = cli(*args)
        tally.input()
        assert res.returncode == 4, f"{args}: {res.stderr}"
        line = _one_error(res.stderr)
        assert f"is inside the chainyard store {store.resolve()}" in line, line
    tally.assert_intact(before, store)
    assert sorted(before) == sorted(snapshot(store)), "files were added inside the store"


# ------------------------------ item 15: accept-reject with unreachable draws; its progress
#: log f of a standard normal, unnormalised: Z_f = sqrt(2 pi)
STD_NORMAL_MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * float(np.dot(theta, theta))
"""


def _accept_reject_config(log_bound: float, draws: int) -> dict[str, object]:
    cfg = base_config(parameters=[{"name": "x", "init": {"normal": {"loc": 0.0, "scale": 1.0}}}])
    cfg["sampler"] = {
        "kind": "accept_reject",
        "envelope": {"normal": {"loc": 0.0, "scale": 2.0}},
        "log_bound": log_bound,
        "draws": draws,
        "chains": 2,
    }
    return cfg


def test_accept_reject_unreachable_draws_stop_in_one_line(tmp_path: Path, tally: Tally) -> None:
    """``log_bound: 1e308`` (nothing is ever accepted) stops with one line naming log_bound
    (exit 2) instead of running for ever at step 0."""
    from chainyard.engine.accept_reject import MAX_PROPOSALS_PER_DRAW

    cfg = write_run(tmp_path, _accept_reject_config(1e308, 2), STD_NORMAL_MODEL)
    res = cli("sample", str(cfg), "--out", str(tmp_path / "s.zarr"))
    tally.input()
    assert res.returncode == 2, res.stderr
    line = _one_error(res.stderr)
    assert "sampler.log_bound = 1e+308" in line and "out of reach" in line, line
    taken = int(line.split("no proposal accepted in ")[1].split()[0].replace(",", ""))
    assert MAX_PROPOSALS_PER_DRAW <= taken < MAX_PROPOSALS_PER_DRAW + 2048, line


def test_accept_reject_progress_shows_the_proposals_acceptance(tmp_path: Path) -> None:
    """The progress line's acceptance is accepted draws / proposals, here 1 / M' with
    M' = M / Z_f: envelope N(0, 2^2), target exp(-x^2/2) with Z_f = sqrt(2 pi) and
    log M = log(2 sqrt(2 pi)) (the maximum of log f - log g), so the expected acceptance is
    Z_f / M = 1/2 (analytic; Robert and Casella 2004, section 2.3)."""
    import math

    log_m = math.log(2 * math.sqrt(2 * math.pi))
    cfg = write_run(tmp_path, _accept_reject_config(log_m + 1e-9, 4000), STD_NORMAL_MODEL)
    res = cli("sample", str(cfg), "--out", str(tmp_path / "s.zarr"), "--progress", "log")
    assert res.returncode == 0, res.stderr
    shown = [
        float(part.split()[1])
        for ln in res.stderr.splitlines()
        for part in ln.split("|")
        if part.strip().startswith("acceptance")
    ]
    assert shown, res.stderr
    # 8,000 draws: the proposals' count is negative binomial, sd of the ratio ~0.006
    assert abs(shown[-1] - 0.5) < 0.03, res.stderr


# -------------------- item 10: non-determinism outside the first-commit window is caught
#: a standard-normal Metropolis-Hastings model that draws from numpy's global RNG only in
#: the tails (|x| > 3.3): the first-commit check at the start state does not see it
TAIL_RANDOM_MODEL = """
import numpy as np

def log_prob(theta, data):
    lp = -0.5 * float(np.dot(theta, theta))
    if np.abs(theta).max() > 3.3:
        lp += 1e-3 * np.random.random()
    return lp
"""

#: a Gibbs sweep for two independent standard normals that uses numpy's global RNG in the
#: tails
TAIL_RANDOM_KERNEL = """
import numpy as np

def sweep(x, rng, data):
    new = rng.standard_normal(x.shape)
    if np.abs(x).max() > 3.3:
        new[0] += 1e-3 * np.random.random()
    return new
"""


def _tail_run(kind: str) -> dict[str, object]:
    cfg = base_config(
        storage={"chunk_steps": 256, "commit_every_steps": 100, "commit_every_seconds": 60},
    )
    if kind == "metropolis_hastings":
        cfg["sampler"] = {"kind": kind, "chains": 8, "steps": 4000, "proposal_sd": 2.5}
    else:
        cfg["sampler"] = {"kind": kind, "kernel": "gibbs.py:sweep", "chains": 8, "steps": 2000}
    return cfg


@pytest.mark.parametrize("kind", ["metropolis_hastings", "kernel"])
def test_randomness_in_the_tails_is_caught_later(kind: str, tmp_path: Path, tally: Tally) -> None:
    """Randomness outside the first-commit window stops the run with one line (exit 3)
    instead of two different stores from one config."""
    files = {"gibbs.py": TAIL_RANDOM_KERNEL}
    cfg = write_run(tmp_path, _tail_run(kind), TAIL_RANDOM_MODEL, files=files)
    res = cli("sample", str(cfg), "--out", str(tmp_path / "s.zarr"))
    tally.fault()
    assert res.returncode == 3, res.stderr
    line = _one_error(res.stderr)
    assert "not deterministic" in line or "not reproducible" in line, line
    assert "keeps its last commit" in line, line


# ---------------------- item 12 (part): documented statuses instead of internal errors (70)
def test_overlong_out_name_is_bad_input(tmp_path: Path, tally: Tally) -> None:
    """``--out`` / ``-o`` with a 300-character name: exit 2, one line, nothing written."""
    cfg = write_run(tmp_path, TINY)
    long = "a" * 300
    res = cli("sample", str(cfg), "--out", str(tmp_path / f"{long}.zarr"))
    tally.input()
    assert res.returncode == 2, res.stderr
    assert "file name too long" in _one_error(res.stderr)
    assert cli("sample", str(cfg), "--out", str(tmp_path / "s.zarr")).returncode == 0
    res = cli("export", str(tmp_path / "s.zarr"), "--raw", "-o", str(tmp_path / f"{long}.csv"))
    tally.input()
    assert res.returncode == 2, res.stderr
    assert "file name too long" in _one_error(res.stderr)
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.startswith(".a")) == []


def test_stdout_closed_is_one_line(tmp_path: Path, tally: Tally) -> None:
    """``results-table --csv`` started with stdout closed: exit 2 and one line, not exit 70."""
    cfg = write_run(tmp_path, TINY)
    assert cli("sample", str(cfg), "--out", str(tmp_path / "s.zarr")).returncode == 0
    res = subprocess.run(
        [
            sys.executable,
            "-m",
            "chainyard.cli",
            "results-table",
            str(tmp_path / "s.zarr"),
            "--raw",
            "--csv",
        ],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
        preexec_fn=lambda: os.close(1),
        timeout=PATIENCE,
    )
    tally.input()
    assert res.returncode == 2, res.stderr
    assert "standard output is closed" in _one_error(res.stderr)


def test_deeply_nested_commit_record_is_damage(tmp_path: Path, tally: Tally) -> None:
    """``commit.json`` nested 200,000 deep: exit 4 naming the file (not a RecursionError)."""
    cfg = write_run(tmp_path, TINY)
    store = tmp_path / "s.zarr"
    assert cli("sample", str(cfg), "--out", str(store)).returncode == 0
    (store / "commit.json").write_text("[" * 200_000 + "]" * 200_000)
    for args in (
        ("verify", str(store)),
        ("inspect", str(store)),
        ("results-table", str(store), "--raw"),
    ):
        res = cli(*args)
        tally.fault()
        assert res.returncode in (4, 7), f"{args}: {res.stderr}"
        line = _one_error(res.stderr)
        assert "commit.json" in line, line


@pytest.mark.parametrize(
    "identity", [None, {"model_source": 5}, {"extra_sources": [1]}], ids=["null", "int", "list"]
)
def test_edited_identity_stamp(identity: object, tmp_path: Path, tally: Tally) -> None:
    """An edited ``identity`` attribute: ``plot`` exits 4 naming the attribute (never an
    internal error, exit 70)."""
    import json

    cfg = write_run(tmp_path, TINY)
    store = tmp_path / "s.zarr"
    assert cli("sample", str(cfg), "--out", str(store)).returncode == 0
    meta = json.loads((store / "zarr.json").read_text())
    meta["attributes"]["chainyard"]["identity"] = identity
    (store / "zarr.json").write_text(json.dumps(meta))
    res = cli("plot", str(store), "--raw", "-o", str(tmp_path / "plots"))
    tally.fault()
    # the seal is checked on every read: any edit is exit 4 naming the attribute
    assert res.returncode == 4, res.stderr
    assert "identity" in _one_error(res.stderr)
