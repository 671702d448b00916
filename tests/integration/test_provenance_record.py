"""Provenance records: completeness of every listed field, PROV-JSON export, `inspect`."""

from __future__ import annotations

import copy
import hashlib
import json
import platform
from importlib import metadata
from pathlib import Path
from typing import Any

import pytest
from prov.model import ProvActivity, ProvDocument, ProvEntity, ProvGeneration, ProvUsage

import chainyard
from chainyard.analysis.records import input_identity
from chainyard.provenance.record import (
    REQUIRED_FIELDS,
    missing_fields,
    provenance_record,
    stamp,
    store_digest,
)
from chainyard.store import Store
from chainyard.store.integrity import canonical_sha256
from tests.conftest import base_config, cli, write_run


@pytest.fixture(scope="module")
def run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A run folder: store sampled to 200 then extended to 260, records, trimmed store."""
    folder = tmp_path_factory.mktemp("run")
    cfg = base_config(
        model={"log_prob": "model.py:log_prob", "data": "obs.csv"},
        sampler={"walkers": 16, "steps": 200},
        storage={"chunk_steps": 100, "fsync": False},
    )
    path = write_run(folder, cfg, files={"obs.csv": "t,y\n0,1.0\n"})
    for args in (
        ("sample", str(path), "--out", "s.zarr", "--progress", "off"),
        ("sample", str(path), "--out", "s.zarr", "--progress", "off", "--steps", "260"),
        ("decide", "burn-in", "s.zarr", "--out", "burn.json"),
        ("derive", "s.zarr", "--out", "t.zarr", "--burn-in-record", "burn.json"),
        ("diagnose", "t.zarr", "--json", "diagnostics.json"),
    ):
        res = cli(*args, cwd=folder)
        assert res.returncode == 0, res.stderr
    return folder


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_store_record_is_complete_and_correct(run: Path) -> None:
    """A sampled store's record fills every listed field, each with the value it must have."""
    rec = provenance_record(run / "s.zarr")
    assert rec["format"] == "chainyard.provenance" and rec["format_version"] == 1
    assert rec["missing"] == []
    sw = rec["generated_by"]["software"]
    for pkg in ("numpy", "emcee", "zarr", "chainyard"):
        assert sw[pkg] == metadata.version(pkg)
    assert sw["python"] == platform.python_version()
    assert rec["generated_by"]["platform"]["platform"] == platform.platform()
    r = rec["runs"][0]
    stored = Store.open(run / "s.zarr").attrs["config"]
    assert r["config"] == stored and r["config_sha256"] == canonical_sha256(stored)
    sources = {s["role"]: s for s in r["sources"]}
    assert sources["model"] == {
        "role": "model",
        "path": "model.py",
        "sha256": _sha(run / "model.py"),
    }
    assert sources["data"] == {"role": "data", "path": "obs.csv", "sha256": _sha(run / "obs.csv")}
    assert (r["seed"], r["replica"], r["spawn_keys"]) == (7, 0, {"init": [0, 0], "sampler": [0, 1]})
    assert "git" in r and "git" in rec["generated_by"]
    segs = [(s["kind"], s["from_step"], s["to_step"]) for s in r["segments"]]
    assert segs == [("start", 0, 200), ("extend", 200, 260)]
    assert all(
        s["host"] == platform.node() and s["ended_utc"] >= s["started_utc"] for s in r["segments"]
    )
    assert (r["resumed"], r["extended"]) == (False, True)
    assert rec["times"] == {
        "started_utc": r["segments"][0]["started_utc"],
        "ended_utc": r["segments"][-1]["ended_utc"],
    }
    assert {(i["path"], i["sha256"]) for i in rec["inputs"]} == {
        ("model.py", _sha(run / "model.py")),
        ("obs.csv", _sha(run / "obs.csv")),
    }
    assert rec["subject"]["sha256"] == store_digest(Store.open(run / "s.zarr"))


@pytest.mark.parametrize("field", REQUIRED_FIELDS)
def test_completeness_check_fails_for_each_missing_field(run: Path, field: str) -> None:
    """Removing any one listed field from a complete record makes the completeness check fail."""
    rec = copy.deepcopy(provenance_record(run / "s.zarr"))
    parts = field.rstrip("?").split(".")
    node: Any = rec
    for part in parts[:-1]:
        node = node[part[:-3]][0] if part.endswith("[*]") else node[part]
    if isinstance(node, list):  # runs[*].sources.<role>
        node[:] = [s for s in node if s.get("role") != parts[-1]]
    else:
        node.pop(parts[-1])
    assert missing_fields(rec), field


def test_derived_store_record_is_complete(run: Path) -> None:
    """A trimmed store's record names its derivation, source and record, and the source run."""
    rec = provenance_record(run / "t.zarr")
    assert rec["missing"] == []
    assert rec["subject"]["kind"] == "derived_store"
    (step,) = rec["derivation"]
    burn = json.loads((run / "burn.json").read_text())
    assert step["discard"] == burn["decision"]["steps_discarded"] and step["factor"] == 1
    assert step["source"]["sha256"] == store_digest(Store.open(run / "s.zarr"))
    assert [i["sha256"] for i in rec["inputs"]] == [
        step["source"]["sha256"],
        _sha(run / "burn.json"),
    ]
    assert [s["kind"] for s in rec["runs"][0]["segments"]] == ["start", "extend"]


def test_records_with_stamp_are_complete(run: Path, tmp_path: Path) -> None:
    """A JSON record whose provenance block is stamp(inputs) fills every listed field itself."""
    stores = [Store.open(run / "t.zarr")]
    out = tmp_path / "decision.json"
    body = {"kind": "x", "inputs": [input_identity(s) for s in stores], "provenance": stamp(stores)}
    out.write_text(json.dumps(body))
    rec = provenance_record(out, resolve=False)
    assert rec["missing"] == []
    assert rec["runs"][0]["segments"][1]["kind"] == "extend"


def test_decision_and_diagnostics_records_are_complete_on_their_own(run: Path) -> None:
    """Decision and diagnostics records answer every provenance question without their inputs."""
    for name in ("burn.json", "diagnostics.json"):
        assert provenance_record(run / name, resolve=False)["missing"] == [], name


def test_records_are_complete_with_their_inputs_at_hand(run: Path) -> None:
    """With the input stores present, records hold the run facts (recorded or resolved)."""
    for name in ("burn.json", "diagnostics.json"):
        rec = provenance_record(run / name)
        origin = rec["runs"][0]["origin"] if rec["runs"] else ""
        assert origin == "recorded" or origin.startswith("resolved: "), origin
        assert set(rec["missing"]) <= {"generated_by.platform.platform", "times.started_utc"}


def test_prov_json_parses_back(run: Path) -> None:
    """export-prov writes PROV-JSON that the prov library reads back with the run's facts."""
    res = cli("export-prov", "t.zarr", cwd=run)
    assert res.returncode == 0, res.stderr
    doc = ProvDocument.deserialize(content=res.stdout, format="json")
    records = doc.get_records()
    entities = {str(r.identifier): r for r in records if isinstance(r, ProvEntity)}
    activities = {str(r.identifier): r for r in records if isinstance(r, ProvActivity)}
    me = f"cy:store-{store_digest(Store.open(run / 't.zarr'))}"
    assert me in entities
    model = entities[f"cy:file-{_sha(run / 'model.py')}"]
    assert dict(model.attributes)[model.bundle.valid_qualified_name("cy:sha256")] == _sha(
        run / "model.py"
    )
    segments = sorted(a for a in activities if a.startswith("cy:segment-"))
    assert len(segments) == 2 and all(activities[a].get_startTime() for a in segments)
    assert any(a.startswith("cy:derive-") for a in activities)
    generated = {
        str(r.get_attribute("prov:entity").pop()) for r in records if isinstance(r, ProvGeneration)
    }
    assert me in generated
    used = [r for r in records if isinstance(r, ProvUsage)]
    assert len(used) >= 4
    assert doc == ProvDocument.deserialize(content=doc.serialize(format="json"), format="json")


def test_prov_json_of_a_record(run: Path, tmp_path: Path) -> None:
    """A diagnostics record exports as an entity generated by a computation that used the store."""
    res = cli("export-prov", str(run / "diagnostics.json"), "--out", str(tmp_path / "p.json"))
    assert res.returncode == 0, res.stderr
    doc = ProvDocument.deserialize(source=str(tmp_path / "p.json"), format="json")
    ids = {str(r.identifier) for r in doc.get_records() if r.identifier is not None}
    assert f"cy:record-{_sha(run / 'diagnostics.json')}" in ids
    assert f"cy:store-{store_digest(Store.open(run / 't.zarr'))}" in ids


def test_inspect_text(run: Path) -> None:
    """inspect prints what, steps, when, how long, history, verdict and provenance highlights."""
    res = cli("inspect", "t.zarr", cwd=run)
    assert res.returncode == 0, res.stderr
    out = res.stdout
    assert out.startswith("t.zarr: derived store (discard ")
    for label in (
        "what",
        "steps",
        "when",
        "how long",
        "history",
        "resumed",
        "verdict",
        "software",
        "git",
        "inputs",
        "provenance",
        "integrity",
    ):
        assert f"\n  {label:<10} " in out, label
    assert "16 walkers, seed 7, replica 0" in out
    assert "from diagnostics.json)" in out  # the record beside the store names it by hash
    assert "history    start 0-200 on " in out and "; extend 200-260 on " in out
    assert "resumed    no; extended yes" in out
    assert f"chainyard {chainyard.__version__}, python {platform.python_version()}" in out


def test_inspect_json(run: Path) -> None:
    """inspect --json gives the same summary for machines, with the full provenance facts."""
    res = cli("inspect", "s.zarr", "--json", cwd=run)
    assert res.returncode == 0, res.stderr
    s = json.loads(res.stdout)
    assert s["kind"] == "store" and s["steps"]["stored"] == 260 and s["what"]["replica"] == 0
    assert s["verdict"] is None  # the diagnostics record names the trimmed store, not this one
    assert s["integrity"]["ok"] is True and s["provenance"]["missing"] == []
    assert s["provenance"]["config_sha256"] == Store.open(run / "s.zarr").attrs["config_hash"]


def test_plot_metadata_carries_provenance(run: Path, tmp_path: Path) -> None:
    """A PNG saved with png_metadata(stores) carries a complete record and verifies."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from chainyard.provenance.stamps import png_metadata
    from chainyard.provenance.verify import verify

    fig, ax = plt.subplots()
    ax.plot([0, 1])
    fig.savefig(tmp_path / "trace.png", metadata=png_metadata([Store.open(run / "t.zarr")]))
    plt.close(fig)
    rec = provenance_record(tmp_path / "trace.png", resolve=False)
    assert rec["subject"]["kind"] == "plot" and rec["missing"] == []
    assert rec["inputs"][0]["sha256"] == store_digest(Store.open(run / "t.zarr"))
    assert verify(tmp_path / "trace.png").ok


def test_sidecar_names_its_output_and_inputs(run: Path, tmp_path: Path) -> None:
    """A sidecar makes a CSV's provenance complete; editing the CSV afterwards fails verify."""
    from chainyard.provenance.stamps import write_sidecar
    from chainyard.provenance.verify import verify

    csv = tmp_path / "summary.csv"
    csv.write_text("parameter,mean\nx,0.01\n")
    sidecar = write_sidecar(csv, [Store.open(run / "t.zarr")])
    assert sidecar == tmp_path / "summary.csv.provenance.json"
    rec = provenance_record(sidecar, resolve=False)
    assert rec["missing"] == [] and rec["subject"]["path"] == str(csv)
    assert verify(sidecar).ok
    csv.write_text("parameter,mean\nx,0.02\n")
    (line,) = [str(p) for p in verify(sidecar).problems]
    assert line.startswith(f"output {csv}: changed since it was used")
