"""What a new user tripped on (issue 24), through the real command line.

Burn-in never slips into `diagnose`/`decide thinning`/`derive` results unnoticed, the
Metropolis-Hastings adaptation window is always discarded, contradictions are refused in one
line, options are never abbreviated, `sample --replicas N` samples every replica, and a file
that is neither a store nor a pack says so first.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import chainyard
from tests.conftest import base_config, cli, write_run

pytestmark = pytest.mark.slow  # about 40 real `chainyard` processes

VECTOR_MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * np.sum(theta * theta, axis=1)
"""


def one_error(res: Any, code: int) -> str:
    """The single stderr line of a refused command with exit status ``code``."""
    assert res.returncode == code, (res.returncode, res.stdout, res.stderr)
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1, res.stderr
    assert "Traceback" not in res.stderr
    return lines[0]


@pytest.fixture(scope="module")
def run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Two replicas of a 2-D Gaussian (300 steps), sampled by one `sample --replicas 2`,
    and a burn-in record decided on them."""
    folder = tmp_path_factory.mktemp("newcomer")
    cfg = base_config(
        model={"log_prob": "model.py:log_prob", "vectorized": True},
        sampler={"walkers": 16, "steps": 300},
        storage={"fsync": False},
        replicas=2,
    )
    write_run(folder, cfg, VECTOR_MODEL)
    res = cli(
        "sample", "run.yaml", "--out", "r/replica-{replica}.zarr", "--replicas", "2",
        "--progress", "off", cwd=folder,
    )
    assert res.returncode == 0, res.stderr
    res = cli("decide", "burn-in", "r/replica-0.zarr", "r/replica-1.zarr", "--out", "b.json",
              cwd=folder)
    assert res.returncode == 0, res.stderr
    return folder


STORES = ("r/replica-0.zarr", "r/replica-1.zarr")


def test_sample_replicas_samples_every_replica(run: Path, tmp_path: Path) -> None:
    """`sample --replicas 2` makes replicas 0 and 1, each bitwise the store of its own
    `sample --replica R` command."""
    for r in (0, 1):
        store = chainyard.open_store(run / f"r/replica-{r}.zarr")
        assert store.replica == r and store.steps_done == 300
        res = cli("sample", str(run / "run.yaml"), "--out", str(tmp_path / f"d{r}.zarr"),
                  "--replica", str(r), "--progress", "off")
        assert res.returncode == 0, res.stderr
        direct = chainyard.open_store(tmp_path / f"d{r}.zarr")
        assert np.array_equal(store.draws(), direct.draws())


def test_sample_replicas_needs_the_placeholder(run: Path) -> None:
    """--replicas without {replica} in --out, or beside --replica: one line, exit 2."""
    line = one_error(cli("sample", "run.yaml", "--out", "x.zarr", "--replicas", "2", cwd=run), 2)
    assert line == (
        "chainyard: error: --replicas 2: --out must hold {replica} so that every replica gets "
        "its own store (e.g. --out 'run/replica-{replica}.zarr')"
    )
    res = cli("sample", "run.yaml", "--out", "r/replica-{replica}.zarr", "--replicas", "2",
              "--replica", "1", cwd=run)
    assert "give it or --replica R, not both" in one_error(res, 2)
    assert not (run / "x.zarr").exists()


def test_templated_out_without_replicas_says_only_replica_0(run: Path) -> None:
    """A {replica} --out without --replicas on a 2-replica config says it samples replica 0
    only and how to sample them all."""
    res = cli("sample", "run.yaml", "--out", "r/replica-{replica}.zarr", "--progress", "off",
              cwd=run)
    assert res.returncode == 0, res.stderr
    assert "note: sampling replica 0 only of 2; --replicas 2 samples them all" in res.stderr


def test_diagnose_refuses_sampled_stores_without_a_selection(run: Path) -> None:
    """diagnose on sampled stores with neither a record nor --raw: one line, exit 4."""
    line = one_error(cli("diagnose", *STORES, cwd=run), 4)
    assert line.startswith("chainyard: error: r/replica-0.zarr: a sampled store (burn-in ")
    assert "--burn-in-record" in line and "--raw" in line


def test_diagnose_with_a_record_reads_the_kept_rows(run: Path) -> None:
    """diagnose --burn-in-record diagnoses exactly the rows after the recorded cut, and says
    so; --raw says burn-in is included; a derived store gives the record's numbers."""
    cut = json.loads((run / "b.json").read_text())["decision"]["steps_discarded"]
    assert 0 < cut < 300
    res = cli("diagnose", *STORES, "--burn-in-record", "b.json", "--json", "d.json", cwd=run)
    assert res.returncode == 0, res.stderr
    header = res.stdout.splitlines()[0]
    assert header == (
        f"2 replica(s) x 16 walkers x {300 - cut} steps (burn-in {cut:,} steps discarded, "
        "every 1 kept (from records))"
    )
    rec = json.loads((run / "d.json").read_text())
    assert rec["steps"] == 300 - cut
    assert any(i["path"] == "b.json" for i in rec["inputs"])
    raw = cli("diagnose", *STORES, "--raw", cwd=run)
    assert raw.returncode == 0, raw.stderr
    assert "x 300 steps (every committed draw (--raw: burn-in included))" in raw.stdout
    for r in (0, 1):
        res = cli("derive", STORES[r], "--out", f"t{r}.zarr", "--burn-in-record", "b.json",
                  cwd=run)
        assert res.returncode == 0, res.stderr
    res = cli("diagnose", "t0.zarr", "t1.zarr", "--json", "dt.json", cwd=run)
    assert res.returncode == 0, res.stderr
    derived = json.loads((run / "dt.json").read_text())
    assert derived["params"] == rec["params"]  # the same rows, read in place or copied


def test_decide_thinning_takes_the_same_selection(run: Path) -> None:
    """decide thinning: refused on sampled stores alone (exit 4), accepted with the burn-in
    record, which it names among its inputs."""
    line = one_error(cli("decide", "thinning", *STORES, "--out", "t.json", cwd=run), 4)
    assert "a sampled store (burn-in included)" in line
    assert not (run / "t.json").exists()
    res = cli("decide", "thinning", *STORES, "--burn-in-record", "b.json", "--out", "t.json",
              cwd=run)
    assert res.returncode == 0, res.stderr
    rec = json.loads((run / "t.json").read_text())
    assert rec["decision"]["factor"] >= 1
    assert "b.json" in [i["path"] for i in rec["inputs"]]
    line = one_error(cli("decide", "burn-in", *STORES, "--raw", "--out", "x.json", cwd=run), 2)
    assert "belong to `decide thinning`" in line


def test_raw_with_a_record_is_refused(run: Path) -> None:
    """export/diagnose --raw together with --burn-in-record: one line, exit 2, nothing written."""
    for command in (("export", "-o", "x.csv"), ("diagnose",)):
        res = cli(*command, *STORES, "--raw", "--burn-in-record", "b.json", cwd=run)
        assert one_error(res, 2) == (
            "chainyard: error: --raw (every draw, burn-in included) contradicts "
            "--burn-in-record (the recorded selection); give one or the other"
        )
    assert not (run / "x.csv").exists()


def test_derive_needs_a_record_or_an_explicit_discard(run: Path) -> None:
    """derive without a record is refused (exit 2); with --discard 0 the derived store records
    that burn-in was not decided, and export/diagnose say so."""
    line = one_error(cli("derive", STORES[0], "--out", "d0.zarr", cwd=run), 2)
    assert "--burn-in-record FILE" in line and "--discard N" in line
    assert not (run / "d0.zarr").exists()
    res = cli("derive", STORES[0], "--out", "d0.zarr", "--discard", "0", cwd=run)
    assert res.returncode == 0, res.stderr
    assert "burn-in not decided by a record" in res.stdout
    attrs = chainyard.open_store(run / "d0.zarr").attrs["derived"]
    assert attrs["burn_in_decided"] is False and attrs["discard"] == 0
    note = "burn-in was not decided (derived with --discard 0), so the draws include any burn-in"
    res = cli("export", "d0.zarr", "-o", "d0.csv", cwd=run)
    assert res.returncode == 0, res.stderr
    assert note in res.stdout and note in res.stderr
    res = cli("diagnose", "d0.zarr", cwd=run)
    assert res.returncode == 0, res.stderr
    assert note in res.stdout.splitlines()[0] and note in res.stderr
    line = one_error(
        cli("derive", STORES[0], "--out", "d1.zarr", "--discard", "5", "--burn-in-record",
            "b.json", cwd=run), 2)
    assert "--discard contradicts --burn-in-record" in line
    # a store derived (thinned) from a decided one keeps "decided"
    res = cli("derive", STORES[0], "--out", "k0.zarr", "--burn-in-record", "b.json", cwd=run)
    assert res.returncode == 0, res.stderr
    res = cli("derive", "k0.zarr", "--out", "k1.zarr", "--discard", "0", cwd=run)
    assert res.returncode == 0, res.stderr
    assert chainyard.open_store(run / "k1.zarr").attrs["derived"]["burn_in_decided"] is True


def test_metropolis_adaptation_window_is_always_discarded(tmp_path: Path) -> None:
    """MH with adapt_steps 150 and a fixed burn-in of 10: the record discards 150 and says
    why (draws of the adaptation phase are not from one fixed kernel)."""
    cfg = base_config(
        model={"log_prob": "model.py:log_prob", "vectorized": True},
        storage={"fsync": False},
        burn_in={"policy": "fixed", "steps": 10},
    )
    cfg["sampler"] = {"kind": "metropolis_hastings", "chains": 4, "steps": 400,
                      "proposal_sd": 1.0, "adapt_steps": 150}
    write_run(tmp_path, cfg, VECTOR_MODEL)
    res = cli("sample", "run.yaml", "--out", "m.zarr", "--progress", "off", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    res = cli("decide", "burn-in", "m.zarr", "--out", "b.json", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    decision = json.loads((tmp_path / "b.json").read_text())["decision"]
    assert decision["steps_discarded"] == 150
    assert decision["inputs"]["policy_cut"] == 10 and decision["inputs"]["adapt_steps"] == 150
    assert "adaptation window (sampler.adapt_steps = 150) is always discarded" in res.stdout
    # a policy cut beyond the window is kept, and the reason says it covers the window
    cfg["burn_in"] = {"policy": "fixed", "steps": 200}
    write_run(tmp_path, cfg, VECTOR_MODEL, name="late.yaml")
    res = cli("decide", "burn-in", "m.zarr", "--config", "late.yaml", "--out", "c.json",
              cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert json.loads((tmp_path / "c.json").read_text())["decision"]["steps_discarded"] == 200
    assert "covers the 150 adaptation steps" in res.stdout


def _all_parsers() -> list[tuple[str, argparse.ArgumentParser]]:
    """The chainyard parser and every subcommand's parser (walked recursively)."""
    from chainyard.cli import _parser

    out, todo = [], [("chainyard", _parser())]
    while todo:
        name, p = todo.pop()
        out.append((name, p))
        for action in p._actions:
            if isinstance(action, argparse._SubParsersAction):
                todo.extend((f"{name} {k}", sp) for k, sp in action.choices.items())
    return out


def test_no_parser_accepts_abbreviations(run: Path) -> None:
    """Every parser and subparser has allow_abbrev=False; `--res` and `--step` are refused
    (exit 2) and the complete store is untouched."""
    parsers = _all_parsers()
    assert len(parsers) >= 15  # chainyard + every command, including export and verify
    assert [n for n, p in parsers if p.allow_abbrev] == []
    before = (run / "r/replica-0.zarr/commit.json").read_bytes()
    for option in ("--res", "--step", "--progress-int"):
        res = cli("sample", "run.yaml", "--out", "r/replica-0.zarr", option, cwd=run)
        assert f"unrecognized arguments: {option}" in one_error(res, 2)
    res = cli("export", *STORES, "--burn", "b.json", "-o", "y.csv", cwd=run)
    assert "unrecognized arguments: --burn" in one_error(res, 2)
    assert (run / "r/replica-0.zarr/commit.json").read_bytes() == before


def test_neither_store_nor_pack_says_so_first(tmp_path: Path) -> None:
    """A text file given as a store: "not a chainyard store or pack" comes first (exit 4)."""
    (tmp_path / "notes.txt").write_text("decay rate notes\n")
    line = one_error(cli("decide", "burn-in", "notes.txt", "--out", "b.json", cwd=tmp_path), 4)
    assert line == (
        "chainyard: error: notes.txt: not a chainyard store or pack: not a zip file "
        "(or truncated)"
    )


def test_reference_table_prints_the_energy_distance(run: Path) -> None:
    """diagnose --reference prints the energy distance per parameter in the table, the value
    of the JSON record (scipy.stats.energy_distance in the library)."""
    res = cli("diagnose", STORES[0], "--raw", "--reference", STORES[1], "--json", "ref.json",
              cwd=run)
    assert res.returncode == 0, res.stderr
    rec = json.loads((run / "ref.json").read_text())["reference"]["params"]
    for name in ("x", "y"):
        line = next(s for s in res.stdout.splitlines() if s.startswith(f"  {name}: KS D"))
        assert f"energy distance {rec[name]['energy_distance']:.4g};" in line
