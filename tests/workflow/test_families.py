"""Run families (a template and a table) and batched sampling under real snakemake."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import yaml

import chainyard
from chainyard.errors import ConfigError
from chainyard.workflow.config import load_workflow_config
from chainyard.workflow.families import member_seed
from tests.workflow.conftest import make_workflow, planned_jobs, snakemake

# a model with one data value: the mean of a 1-D normal read from the member's data file
SHIFT_MODEL = """
import numpy as np

def load(path):
    return float(open(path).read())

def log_prob(theta, data):
    return -0.5 * np.sum((theta - data) ** 2, axis=1)
"""

TEMPLATE = {
    "model": {
        "log_prob": "../../models/shift.py:log_prob",
        "data_loader": "../../models/shift.py:load",
        "vectorized": True,
    },
    "parameters": [{"name": "mu", "init": {"normal": {"loc": 0.0, "scale": 1.0}}}],
    "sampler": {"walkers": 8, "steps": 300},
    "storage": {"fsync": False},
    "seed": 11,
    "replicas": 2,
}

FAMILY = {
    "template": "config/runs/star.yaml",
    "table": "config/stars.csv",
    "key": "name",
    "fill": {"model.data": "data_file", "parameters.0.init.normal.loc": "t0_guess"},
}


def family_workflow(folder: Path, rows: list[tuple[str, float]], **settings: object) -> Path:
    """A workflow with the family of the issue's form, one data file per row."""
    make_workflow(folder, {"stars": FAMILY}, models={"shift.py": SHIFT_MODEL}, **settings)
    (folder / "config" / "runs").mkdir(exist_ok=True)
    (folder / "config" / "runs" / "star.yaml").write_text(yaml.safe_dump(TEMPLATE))
    write_table(folder, rows)
    return folder


def write_table(folder: Path, rows: list[tuple[str, float]]) -> None:
    """(Re)write the table and the data files (data file holds the true mean)."""
    (folder / "data").mkdir(exist_ok=True)
    lines = ["name,data_file,t0_guess"]
    for name, mean in rows:
        (folder / "data" / f"{name}.txt").write_text(str(mean))
        lines.append(f"{name},../../data/{name}.txt,{mean}")
    (folder / "config" / "stars.csv").write_text("\n".join(lines) + "\n")


def test_member_seed_depends_on_key_only() -> None:
    """A member's seed is a function of (family seed, key): stable values, distinct keys give
    distinct seeds, and it is the first word of numpy's SeedSequence as documented."""
    s = member_seed(11, "vega")
    assert s == member_seed(11, "vega")
    assert s != member_seed(11, "deneb") and s != member_seed(12, "vega")
    import hashlib

    d = hashlib.sha256(b"vega").digest()
    words = tuple(int.from_bytes(d[i : i + 4], "little") for i in range(0, 32, 4))
    ref = np.random.SeedSequence(11, spawn_key=words).generate_state(1, np.uint64)[0]
    assert s == int(ref) >> 1 and 0 <= s < 2**63


def test_family_expands_and_bad_rows_are_named(tmp_path: Path, monkeypatch) -> None:
    """The issue's YAML form gives one run per row named FAMILY.KEY with filled fields; bad
    rows give one line naming table, row and column (exit status 2)."""
    folder = family_workflow(tmp_path, [("vega", 1.0), ("deneb", -2.0)])
    monkeypatch.chdir(folder)
    cfg = yaml.safe_load((folder / "config" / "config.yaml").read_text())
    runs = load_workflow_config(cfg)
    assert list(runs) == ["stars.vega", "stars.deneb"]
    vega = runs["stars.vega"].config
    assert vega.parameters[0].init.normal.loc == 1.0
    assert vega.seed == member_seed(11, "vega")
    assert "config/runs/../../data/vega.txt" in runs["stars.vega"].input_files()
    (folder / "config" / "stars.csv").write_text(
        "name,data_file,t0_guess\nvega,a.txt,abc\nvega,b.txt,1\nbad/key,c.txt,1\nx,,2\n"
    )
    with pytest.raises(ConfigError) as err:
        load_workflow_config(cfg)
    lines = err.value.problems
    assert lines[0].startswith("config/stars.csv: row 2 (name=vega): column t0_guess = 'abc': ")
    assert lines[1] == "config/stars.csv: row 3: column name = 'vega': the same key as row 2"
    assert lines[2].startswith("config/stars.csv: row 4: column name = 'bad/key': ")
    assert lines[3] == (
        "config/stars.csv: row 5 (name=x): column data_file: empty (it fills model.data)"
    )
    assert err.value.exit_code == 2


@pytest.mark.slow
def test_batched_family_end_to_end(tmp_path: Path) -> None:
    """Six members in batches of four: two sampling jobs; a member whose data breaks the model
    is reported by name (exit 2) while the others finish; adding a row samples only the new
    member; editing a row reruns only that member's analysis; the members' draws
    equal those of a plain run with the derived seed."""
    rows = [(f"s{i}", float(i)) for i in range(6)]
    folder = family_workflow(tmp_path, rows, sample_batch=4)
    (folder / "data" / "s2.txt").write_text("nan-ish")  # the loader fails: exit status 2
    jobs = planned_jobs(folder)
    assert jobs["chainyard_sample_batch"] == 2 and "chainyard_sample" not in jobs
    res = snakemake(folder, "--cores", "2", "--keep-going")
    assert res.returncode != 0
    text = res.stdout + res.stderr
    log = (folder / "results" / "logs" / "stars.s2" / "analyse.log").read_text()
    assert log.startswith("chainyard: error: stars.s2: sampling failed in its batch ")
    assert "model.data_loader: failed on " in log and "stars.s2" in text
    outcome = json.loads((folder / "results" / ".batches" / "stars~0.json").read_text())
    assert outcome["members"]["stars.s2"]["0"]["exit_code"] == 2
    for i in (0, 1, 3, 4, 5):
        assert (folder / "results" / f"stars.s{i}" / "summary.csv").is_file()
    # the member's draws are a plain run's with the derived seed
    store = chainyard.open_store(folder / "results" / "stars.s4" / "draws" / "replica-1.zarr")
    assert store.config.seed == member_seed(11, "s4")
    # fix s2's data, append s6: s2's batch reruns and samples s2 alone; s6 joins the last
    # batch; the others' draws are not touched
    (folder / "data" / "s2.txt").write_text("2.0")
    s0 = folder / "results" / "stars.s0" / ".resumable" / "replica-0.zarr" / "commit.json"
    s4 = folder / "results" / "stars.s4" / ".resumable" / "replica-0.zarr" / "commit.json"
    before = (s0.read_bytes(), s0.stat().st_mtime_ns, s4.stat().st_mtime_ns)
    table = folder / "config" / "stars.csv"
    table.write_text(table.read_text() + "s6,../../data/s6.txt,6.0\n")
    (folder / "data" / "s6.txt").write_text("6.0")
    jobs = planned_jobs(folder)
    assert jobs.get("chainyard_sample_batch") == 2, jobs
    res = snakemake(folder, "--cores", "2")
    assert res.returncode == 0, res.stdout + res.stderr
    assert (s0.read_bytes(), s0.stat().st_mtime_ns, s4.stat().st_mtime_ns) == before
    assert (folder / "results" / "stars.s6" / "summary.csv").is_file()


@pytest.mark.slow
def test_unbatched_family_plans_per_member_and_bad_row_stops_snakemake(tmp_path: Path) -> None:
    """Without batching a family plans one sampling job per member and replica and one
    analysis per member; a bad row stops snakemake before any job with one line, exit 2."""
    folder = family_workflow(tmp_path, [("vega", 1.0), ("deneb", -2.0), ("rigel", 0.5)])
    jobs = planned_jobs(folder)
    assert jobs["chainyard_sample"] == 6 and jobs["chainyard_analyse"] == 3, jobs
    table = folder / "config" / "stars.csv"
    table.write_text(table.read_text() + "altair,../../data/vega.txt,warm\n")
    res = snakemake(folder, "--cores", "1")
    assert res.returncode == 2, res.stdout + res.stderr
    assert (
        "chainyard: error: config/stars.csv: row 5 (name=altair): column t0_guess = 'warm': "
        "Input should be a valid number, unable to parse string as a number"
    ) in res.stderr.splitlines()
    assert not (folder / "results").exists()
