"""Crash fuzz: SIGKILL ``sample``, ``derive`` and ``pack`` at random and at named instants.

Every kill is followed by the same checks before it counts (``tally.killed()``): what was
committed at the kill is byte-identical later (start state and complete chunk files) and equal
to an uninterrupted run's first rows; the rerun completes and is bitwise equal to the
uninterrupted run (draws, log-prob, acceptance, start state, RNG state, checksums); ``chainyard
verify`` exits 0. For ``derive`` and ``pack`` the output is either absent or complete and
equal to an uninterrupted one, and the source is untouched.

The random schedule is seeded: the seed is printed at the start of the module (set
``CHAINYARD_FUZZ_SEED`` to replay a schedule; kill moments still depend on timing).
"""

from __future__ import annotations

import shutil
import zipfile
from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import chainyard
from tests.conftest import write_run
from tests.reliability.conftest import snapshot
from tests.reliability.faults import (
    KillPlan,
    assert_prefix_of,
    committed_files,
    committed_steps,
    execute,
    folder_for_test,
    fuzz_seed,
    instant_wired,
    leftovers,
    rows,
    run,
    scratch,
    start,
)

pytestmark = pytest.mark.slow

SEED = fuzz_seed()
STEPS = 3000
HALF = 1500

#: a cheap vectorised Gaussian: the run's time goes into steps and commits, not the model
MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * np.einsum("ij,ij->i", theta, theta)
"""


def run_config(steps: int, writer: str) -> dict[str, Any]:
    """3 parameters, 16 walkers; chunks of 32 steps and a commit every 20 steps or 20 ms, so
    commits cut chunks in the middle and a kill lands before, inside or after chunk writes
    and commit-record replacements."""
    return {
        "model": {"log_prob": "model.py:log_prob", "vectorized": True},
        "parameters": [
            {"name": "a", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
            {"name": "b", "init": {"normal": {"loc": 1.0, "scale": 2.0}}},
            {"name": "c", "init": {"uniform": {"low": -1.0, "high": 1.0}}},
        ],
        "sampler": {"walkers": 16, "steps": steps},
        "storage": {
            "chunk_steps": 32,
            "commit_every_steps": 20,
            "commit_every_seconds": 0.02,
            "commit_writer": writer,
        },
        "seed": 3,
    }


KILLS: Counter[str] = Counter()


def _say(config: pytest.Config, line: str) -> None:
    """Write ``line`` to the terminal even while output is being captured."""
    tr = config.pluginmanager.get_plugin("terminalreporter")
    cm = config.pluginmanager.get_plugin("capturemanager")
    if tr is None or cm is None:
        return
    with cm.global_and_fixture_disabled():
        tr.write_line(line)


@pytest.fixture(scope="module")
def report(pytestconfig: pytest.Config) -> Iterator[None]:
    """Print the schedule's seed now and the kills per command and moment at the end."""
    _say(pytestconfig, f"\ncrash fuzz seed: {SEED} (CHAINYARD_FUZZ_SEED={SEED} to replay)")
    yield
    _say(
        pytestconfig,
        "crash fuzz kills: " + ", ".join(f"{k} {v}" for k, v in sorted(KILLS.items())),
    )


@pytest.fixture(scope="module")
def space(tmp_path_factory: pytest.TempPathFactory, report: None) -> Iterator[Path]:
    """The module's scratch space: a tmpfs where permitted (see ``faults.scratch``)."""
    with scratch(tmp_path_factory.mktemp("fuzz")) as path:
        yield path


@pytest.fixture
def tmp_path(space: Path, request: pytest.FixtureRequest) -> Path:
    """A fresh folder for one test, inside the scratch space (shadows pytest's tmp_path)."""
    return folder_for_test(space, request)


@pytest.fixture(scope="module")
def work(space: Path) -> Path:
    """A folder with the configs (both writers, full and half length) and an uninterrupted,
    verified reference run of STEPS steps."""
    folder = space / "work"
    folder.mkdir()
    for writer in ("thread", "process"):
        write_run(folder, run_config(STEPS, writer), MODEL, name=f"{writer}.yaml")
        write_run(folder, run_config(HALF, writer), MODEL, name=f"{writer}-half.yaml")
    res = run("sample", "thread.yaml", "--out", "ref.zarr", "--progress", "off", cwd=folder)
    assert res.returncode == 0, res.stderr
    res = run("verify", "ref.zarr", cwd=folder)
    assert res.returncode == 0, res.stdout + res.stderr
    return folder


def assert_same_as_reference(store: Path, reference: Path) -> None:
    """Rows, start state, RNG state and chunk checksums bitwise equal to the reference."""
    got, ref = rows(store), rows(reference)
    assert got.keys() == ref.keys()
    for k in ref:
        assert np.array_equal(got[k], ref[k]), f"{store}: {k} differs from the reference"
    a, b = chainyard.open_store(store), chainyard.open_store(reference)
    assert a.commit_record["random_state"] == b.commit_record["random_state"]
    assert a.commit_record["checksums"] == b.commit_record["checksums"]


def assert_verified(target: Path, cwd: Path) -> None:
    """``chainyard verify TARGET`` exits 0."""
    res = run("verify", str(target), cwd=cwd)
    assert res.returncode == 0, f"verify {target}: exit {res.returncode}\n{res.stdout}{res.stderr}"


class SampleChain:
    """Kill successive ``sample`` processes on one store; check after each kill."""

    def __init__(self, folder: Path, out: Path, reference: Path) -> None:
        self.folder, self.out, self.reference = folder, out, reference
        self.kept: dict[str, str] = {}  # committed files seen so far, with their hashes
        self.kills = 0
        self.landed: Counter[str] = Counter()

    def where(self, extending: bool) -> str:
        """Where the last kill landed, judged from what is on disk."""
        if not self.out.exists():
            return "sample start-up"
        n = committed_steps(self.out)
        if n <= 0:
            return "sample before first commit"
        return "sample extension" if extending else "sample commits"

    def after_kill(self, extending: bool, what: str) -> None:
        """Committed data at the kill: equal to the reference's first rows; files unchanged."""
        self.kills += 1
        self.landed[what or self.where(extending)] += 1
        if committed_steps(self.out) < 0:
            return  # killed before the store's first commit record: nothing committed yet
        assert_prefix_of(self.out, self.reference)
        now = committed_files(self.out)
        changed = [k for k, v in self.kept.items() if now.get(k) != v]
        assert not changed, f"committed files changed after a kill: {changed[:5]}"
        self.kept.update(now)

    def finish(self, cfg: str, *extra: str) -> None:
        """Rerun to completion, compare with the reference, check kept files, verify."""
        res = run(
            "sample", cfg, "--out", str(self.out), "--progress", "off", *extra, cwd=self.folder
        )
        assert res.returncode == 0, res.stderr
        now = committed_files(self.out)
        changed = [k for k, v in self.kept.items() if now.get(k) != v]
        assert not changed, f"committed files changed by the rerun: {changed[:5]}"
        assert_verified(self.out, self.folder)


def random_plan(rng: np.random.Generator, out: Path, target: int, left: int) -> KillPlan:
    """A kill moment: start-up, just after the store appears, or at a random commit."""
    group = bool(rng.random() < 0.3)
    done = max(committed_steps(out), 0)
    u = rng.random()
    if not out.exists() and u < 0.35:
        return KillPlan("created", float(rng.uniform(0.0, 0.08)), group=group)
    if u < (0.6 if not out.exists() else 0.2):
        return KillPlan("startup", float(rng.uniform(0.0, 1.8)), group=group)
    span = max(2, (target - done) // (left + 1))
    at = min(done + int(rng.integers(1, span + 1)), target - 40)
    return KillPlan("commits", float(rng.uniform(0.0, 0.03)), at_step=at, group=group)


CHAINS = [("start", 0), ("start", 1), ("start", 2), ("extend", 3), ("extend", 4)]


@pytest.mark.parametrize(("kind", "index"), CHAINS, ids=[f"{k}{i}" for k, i in CHAINS])
def test_sample_random_kills(kind: str, index: int, work: Path, tmp_path: Path, tally) -> None:
    """Six SIGKILLs of sample at seeded random moments (start-up, store creation, commits;
    extension with --steps for 'extend'), either writer: the rerun equals an uninterrupted
    run bitwise, committed bytes never change and verify exits 0."""
    rng = np.random.default_rng([SEED, index])
    out = tmp_path / "s.zarr"
    chain = SampleChain(work, out, work / "ref.zarr")
    writers = ("thread", "process")

    def killed_run(cfg: str, target: int, left: int, extra: tuple[str, ...] = ()) -> None:
        plan = random_plan(rng, out, target, left)
        proc = start("sample", cfg, "--out", str(out), "--progress", "off", *extra, cwd=work)
        if execute(plan, proc, out.exists, lambda: committed_steps(out)):
            chain.after_kill(bool(extra), "")

    if kind == "start":
        for left in range(6, 0, -1):
            killed_run(f"{writers[int(rng.integers(2))]}.yaml", STEPS, left)
        chain.finish("process.yaml")
    else:
        for left in (2, 1):
            killed_run(f"{writers[int(rng.integers(2))]}-half.yaml", HALF, left)
        res = run("sample", "thread-half.yaml", "--out", str(out), "--progress", "off", cwd=work)
        assert res.returncode == 0, res.stderr
        assert assert_prefix_of(out, work / "ref.zarr") == HALF
        for left in range(4, 0, -1):
            cfg = f"{writers[int(rng.integers(2))]}-half.yaml"
            killed_run(cfg, STEPS, left, ("--steps", str(STEPS)))
        chain.finish("thread-half.yaml", "--steps", str(STEPS))
    assert_same_as_reference(out, work / "ref.zarr")
    assert chain.kills >= 3, f"only {chain.kills} of the planned kills landed (seed {SEED})"
    KILLS.update(chain.landed)
    tally.killed(chain.kills)


# ------------------------------------------------------------------ named instants
def _instant_env(spec: str) -> dict[str, str]:
    return {"CHAINYARD_TEST_KILL_AT": spec}


def _require(name: str) -> None:
    if not instant_wired(name):
        pytest.skip(f"the kill instant {name!r} is not wired into the code yet")


SAMPLE_INSTANTS = {
    # each: the kill specs of successive processes (writer, CHAINYARD_TEST_KILL_AT)
    # store-created is reached once per store: one chain per writer.
    # With the process writer, commits go to the thread until the helper process is ready
    # and then to the helper; each counts its own instants, and where the split falls
    # depends on the machine's speed. A commit is made at least every 40 steps (twice
    # commit_every_steps), so the last process (about 2,700 steps left) makes at least 68
    # commits and one of the two writers reaches the 25th whatever the split.
    "store-created": [("thread", "store-created")],
    "store-created-process": [("process", "store-created")],
    "chunks-written": [
        ("thread", "chunks-written"),
        ("process", "chunks-written:3"),
        ("thread", "chunks-written:7"),
        ("process", "chunks-written:25"),
    ],
    "commit-replaced": [
        ("thread", "commit-replaced"),
        ("process", "commit-replaced:2"),
        ("thread", "commit-replaced:9"),
        ("process", "commit-replaced:25"),
    ],
}


@pytest.mark.parametrize("case", list(SAMPLE_INSTANTS))
def test_sample_named_instants(case: str, work: Path, tmp_path: Path, tally) -> None:
    """SIGKILL sample at a named instant (CHAINYARD_TEST_KILL_AT), with either writer, one
    process after another: the rerun equals an uninterrupted run and verify exits 0."""
    name = SAMPLE_INSTANTS[case][0][1].partition(":")[0]
    _require(name)
    out = tmp_path / "s.zarr"
    chain = SampleChain(work, out, work / "ref.zarr")
    for writer, spec in SAMPLE_INSTANTS[case]:
        res = run(
            "sample",
            f"{writer}.yaml",
            "--out",
            str(out),
            "--progress",
            "off",
            env=_instant_env(spec),
            cwd=work,
        )
        if res.returncode == -9:
            chain.after_kill(False, f"instant {name}")
            continue
        # the commit helper (not the sampler) reached the instant and was killed: the run
        # must stop with one clear line and keep its last commit
        lines = [ln for ln in res.stderr.splitlines() if ln.startswith("chainyard: error:")]
        assert res.returncode not in (0, 70) and len(lines) == 1, (spec, res.stderr)
        assert "Traceback" not in res.stderr, res.stderr
        chain.after_kill(False, f"instant {name} (commit helper)")
    chain.finish("thread.yaml")
    assert_same_as_reference(out, work / "ref.zarr")
    KILLS.update(chain.landed)
    tally.killed(chain.kills)


FAILING_MODEL = """
import numpy as np

CALLS = [0]


def log_prob(theta, data):
    CALLS[0] += 1
    if CALLS[0] == 10:  # a few steps in, before the first commit (every 20 steps)
        raise ValueError("planned failure")
    return -0.5 * np.einsum("ij,ij->i", theta, theta)
"""


def test_discarding_a_never_committed_store_killed_half_way(
    work: Path, tmp_path: Path, tally
) -> None:
    """A run that fails before its first data commit discards the store it created; the
    sampler is killed while discarding. The store's path then holds either the whole store
    or nothing (never a half-removed store, which a rerun would refuse when its commit record
    went first), the rerun starts cleanly and equals an uninterrupted run, and nothing is
    left beside the store."""
    _require("store-discarding")
    folder = tmp_path / "run"
    cfg = run_config(STEPS, "thread")
    cfg["storage"]["commit_every_seconds"] = 3600  # no commit before the failure, however slow
    write_run(folder, cfg, FAILING_MODEL, name="run.yaml")
    out = folder / "s.zarr"
    res = run(
        "sample",
        "run.yaml",
        "--out",
        str(out),
        "--progress",
        "off",
        env=_instant_env("store-discarding"),
        cwd=folder,
    )
    assert res.returncode == -9, (res.returncode, res.stderr)
    assert not out.exists(), "a half-removed store was left at the store's path"
    assert any(".discarded-" in p.name for p in folder.iterdir()), "the kill missed"
    (folder / "model.py").write_text(MODEL)
    res = run("sample", "run.yaml", "--out", str(out), "--progress", "off", cwd=folder)
    assert res.returncode == 0, res.stderr
    assert_same_as_reference(out, work / "ref.zarr")
    assert_verified(out, folder)
    left = sorted(p.name for p in folder.iterdir() if p.suffix in (".zarr", "") or "." in p.name)
    assert not [n for n in left if ".discarded-" in n], f"left beside the store: {left}"
    tally.killed(1)


# ------------------------------------------------------------------ derive and pack
def _new_entries(parent: Path, known: set[str]) -> bool:
    return any(p.name not in known for p in parent.iterdir())


@pytest.fixture(scope="module")
def derived(work: Path) -> Path:
    """An uninterrupted derive of the reference store (the expected output)."""
    src = work / "src-d.zarr"
    shutil.copytree(work / "ref.zarr", src)
    res = run("derive", "--discard", "0", str(src), "--out", "derived-ref.zarr", cwd=work)
    assert res.returncode == 0, res.stderr
    return work / "derived-ref.zarr"


@pytest.fixture(scope="module")
def packed(work: Path) -> Path:
    """An uninterrupted pack of the reference store (the expected output)."""
    res = run("pack", "ref.zarr", "--out", "ref.zip", cwd=work)
    assert res.returncode == 0, res.stderr
    return work / "ref.zip"


def check_derived(out: Path, expected: Path) -> None:
    """The derived output is absent, or complete and equal to an uninterrupted derive."""
    if not out.exists():
        return
    got, ref = rows(out), rows(expected)
    assert got.keys() == ref.keys(), f"{out}: incomplete derived store"
    for k in ref:
        assert np.array_equal(got[k], ref[k]), f"{out}: {k} differs from a complete derive"


def pack_members(path: Path) -> tuple[dict[str, bytes], set[str]]:
    """The store's members of a pack with their bytes, and the names of the pack's own
    members (``pack/...``: manifest and provenance, which hold the packing time and the
    source's path)."""
    with zipfile.ZipFile(path) as z:
        names = z.namelist()
        data = {n: z.read(n) for n in names if not n.startswith("pack/")}
    return data, {n for n in names if n.startswith("pack/")}


def check_pack(out: Path, expected: Path) -> None:
    """The pack is absent, or complete: the same store bytes and members as an
    uninterrupted pack."""
    if not out.exists():
        return
    assert pack_members(out) == pack_members(expected), f"{out}: differs from a complete pack"


def derive_plan(rng: np.random.Generator, command: str) -> KillPlan:
    """A kill moment for derive or pack: start-up, or just after the output appears (pack
    writes its zip in a fraction of a second once started, so its delays are shorter)."""
    group = bool(rng.random() < 0.3)
    late = 2.5 if command == "derive" else 1.4
    if rng.random() < 0.4:
        return KillPlan("startup", float(rng.uniform(0.2, late)), group=group)
    after = 0.6 if command == "derive" else 0.1
    return KillPlan("created", float(rng.uniform(0.0, after)), group=group)


def _cmd(command: str) -> list[str]:
    """The command words: derive keeps every step explicitly (no burn-in record here)."""
    return [command, "--discard", "0"] if command == "derive" else [command]


@pytest.mark.parametrize("command", ["derive", "pack"])
def test_derive_pack_random_kills(
    command: str, work: Path, tmp_path: Path, derived: Path, packed: Path, tally
) -> None:
    """Eight SIGKILLs of derive or pack at seeded random moments (start-up, while writing):
    the output is absent or complete, the source is untouched, the rerun is complete and
    equal to an uninterrupted one, and verify exits 0."""
    rng = np.random.default_rng([SEED, 100 + (command == "pack")])
    src = tmp_path / "src.zarr"
    shutil.copytree(work / "ref.zarr", src)
    before = snapshot(src)
    out = tmp_path / ("out.zarr" if command == "derive" else "out.zip")
    check = check_derived if command == "derive" else check_pack
    expected = derived if command == "derive" else packed
    kills = 0
    for _ in range(8):
        known = {p.name for p in tmp_path.iterdir()}
        proc = start(*_cmd(command), str(src), "--out", str(out), cwd=tmp_path)
        plan = derive_plan(rng, command)
        if execute(plan, proc, lambda k=known: _new_entries(tmp_path, k), lambda: 0):
            kills += 1
            moment = "writing" if _new_entries(tmp_path, known) else "start-up"
            KILLS[f"{command} {moment}"] += 1
        check(out, expected)
        tally.assert_intact(before, src, f"{command} source")
    res = run(*_cmd(command), str(src), "--out", str(out), cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert out.exists()
    check(out, expected)
    assert_verified(out, tmp_path)
    tally.assert_intact(before, src, f"{command} source")
    assert kills >= 1, f"only {kills} kills of {command} landed (seed {SEED})"
    tally.killed(kills)


@pytest.mark.parametrize(
    ("command", "name"), [("derive", "derive-before-publish"), ("pack", "pack-before-publish")]
)
def test_derive_pack_named_instant(
    command: str, name: str, work: Path, tmp_path: Path, derived: Path, packed: Path, tally
) -> None:
    """SIGKILL derive or pack just before it publishes its output (fresh, and replacing an
    existing output): nothing half-written is visible, the source and an older output are
    untouched, and the rerun completes and verifies."""
    _require(name)
    src = tmp_path / "src.zarr"
    shutil.copytree(work / "ref.zarr", src)
    before = snapshot(src)
    out = tmp_path / ("out.zarr" if command == "derive" else "out.zip")
    check = check_derived if command == "derive" else check_pack
    expected = derived if command == "derive" else packed
    res = run(*_cmd(command), str(src), "--out", str(out), env=_instant_env(name), cwd=tmp_path)
    assert res.returncode == -9, f"{name} was not reached: exit {res.returncode}\n{res.stderr}"
    assert not out.exists(), f"{out} exists after a kill before it was published"
    tally.assert_intact(before, src, f"{command} source")
    res = run(*_cmd(command), str(src), "--out", str(out), cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    old = snapshot(out)
    res = run(*_cmd(command), str(src), "--out", str(out), env=_instant_env(name), cwd=tmp_path)
    assert res.returncode == -9, f"{name} was not reached: exit {res.returncode}\n{res.stderr}"
    tally.assert_intact(old, out, f"the earlier {command} output")
    res = run(*_cmd(command), str(src), "--out", str(out), cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    check(out, expected)
    assert_verified(out, tmp_path)
    tally.assert_intact(before, src, f"{command} source")
    assert not leftovers(src), leftovers(src)
    KILLS[f"instant {name}"] += 2
    tally.killed(2)
