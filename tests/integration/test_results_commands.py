"""`chainyard export`, `results-table` and `plot` on real stores, through the real command line.

Reference libraries used only in tests: arviz-base 0.8 (opens the exported files) and
arviz-stats 0.8 (R-hat on the exported file); emcee's own ``autocorr.integrated_time``
for the per-replica tau of the burn-in record.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import emcee
import numpy as np
import pytest
import yaml

import chainyard
from chainyard.analysis import decide_burn_in, derive_store, diagnose, read_record, write_record
from chainyard.analysis.replicas import open_replicas
from chainyard.analysis.summary_table import summary_table, write_summary_csv
from chainyard.diagnostics import rhat
from tests.conftest import cli, tree_snapshot, write_run

arviz_base = pytest.importorskip("arviz_base")
arviz_stats = pytest.importorskip("arviz_stats")

#: parameters deliberately not in alphabetical order; one long label, units, a reference value
CONFIG = {
    "model": {"log_prob": "model.py:log_prob"},
    "parameters": [
        {
            "name": "zeta",
            "init": {"normal": {"loc": 4.0, "scale": 0.5}},
            "unit": "m",
            "label": "distance of the reflector from the sensor, measured along the beam axis",
            "reference_value": 0.0,
        },
        {"name": "alpha", "init": {"uniform": {"low": -1.0, "high": 1.0}}, "unit": "s"},
    ],
    "sampler": {"walkers": 8, "steps": 800, "blobs": ["total"]},
    "seed": 11,
    "replicas": 2,
}

MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * float(np.dot(theta, theta)), float(theta[0] + theta[1])
"""


@pytest.fixture(scope="module")
def run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Two sampled replicas, a burn-in record and the two trimmed (derived) stores."""
    folder = tmp_path_factory.mktemp("results")
    config_path = write_run(folder, yaml.safe_dump(CONFIG, sort_keys=False), MODEL)
    config = chainyard.load_config(config_path)
    raw = [
        chainyard.sample(config, folder / f"r{r}.zarr", replica=r, progress="off") for r in range(2)
    ]
    decision = decide_burn_in(raw, config.burn_in)
    write_record(
        folder / "burn_in.json",
        "chainyard.burn_in_decision",
        {"decision": decision.to_dict()},
        raw,
    )
    for r, s in enumerate(raw):
        derive_store(
            s,
            folder / f"t{r}.zarr",
            discard=decision.steps_discarded,
            records=[folder / "burn_in.json"],
        )
    return folder


def _one_line_error(proc: object, code: int) -> str:
    """The single stderr line of a refused command (no traceback), after checking its status."""
    assert proc.returncode == code, (proc.stdout, proc.stderr)  # type: ignore[attr-defined]
    lines = proc.stderr.strip().splitlines()  # type: ignore[attr-defined]
    assert len(lines) == 1 and lines[0].startswith("chainyard: error: "), lines
    return lines[0]


def _expected_chains(folder: Path, name: str) -> np.ndarray:
    """(chains, draws) of the trimmed stores: chain = replica x walker (replicas in order)."""
    stores = [chainyard.open_store(folder / f"t{r}.zarr") for r in range(2)]
    return np.concatenate([s.column(name).T for s in stores])


@pytest.mark.parametrize("ext", [".nc", ".zarr"])
def test_export_datatree_round_trip(run: Path, ext: str) -> None:
    """netCDF and zarr exports open with arviz-base, hold every draw and attribute, and
    arviz-stats' R-hat on them equals chainyard's on the same draws."""
    out = run / f"export{ext}"
    proc = cli("export", "t1.zarr", "t0.zarr", "-o", out.name, cwd=run)
    assert proc.returncode == 0, proc.stderr
    assert "16 chains x" in proc.stdout
    tree = arviz_base.convert_to_datatree(str(out))  # reference library: arviz-base 0.8
    post, stats = tree["posterior"], tree["sample_stats"]
    zeta = _expected_chains(run, "zeta")
    assert np.array_equal(post["zeta"].values, zeta)
    assert np.array_equal(post["alpha"].values, _expected_chains(run, "alpha"))
    assert list(post["replica"].values) == [0] * 8 + [1] * 8
    assert list(post["walker"].values) == list(range(8)) * 2
    stores = [chainyard.open_store(run / f"t{r}.zarr") for r in range(2)]
    discard = stores[0].attrs["derived"]["discard"]
    assert post["step"].values[0] == discard + 1  # first kept draw: after step discard + 1
    assert np.array_equal(stats["lp"].values, np.concatenate([s.log_prob().T for s in stores]))
    assert stats["accepted"].values.dtype == bool
    assert np.array_equal(
        stats["accepted"].values, np.concatenate([s.accepted().T for s in stores])
    )
    assert np.array_equal(post["total"].values, np.concatenate([s.blob("total").T for s in stores]))
    assert post["zeta"].attrs["units"] == "m"
    assert post["zeta"].attrs["long_name"].startswith("distance of the reflector")
    assert post["zeta"].attrs["reference_value"] == 0.0
    assert post.attrs["parameter_names"] == "zeta,alpha" and post.attrs["blob_names"] == "total"
    prov = json.loads(tree.attrs["chainyard_provenance"])
    assert prov["format"] == "chainyard.export"
    assert len(prov["stores"]) == 2 and prov["stores"][0]["runs"]
    # reference library arviz-stats 0.8: rank-normalised split R-hat, every chain of the file
    ref = arviz_stats.rhat(tree)["zeta"].item()
    assert ref == pytest.approx(rhat(zeta), rel=1e-9)


def test_export_csv_rows_columns_and_recorded_selection(run: Path) -> None:
    """CSV has one row per draw with chain/draw/replica/walker/step columns; sampled stores
    with the burn-in record export exactly the rows the derived stores hold."""
    proc = cli("export", "t0.zarr", "t1.zarr", "-o", "derived.csv", cwd=run)
    assert proc.returncode == 0, proc.stderr
    proc = cli(
        "export",
        "r0.zarr",
        "r1.zarr",
        "--burn-in-record",
        "burn_in.json",
        "-o",
        "rec.csv",
        cwd=run,
    )
    assert proc.returncode == 0, proc.stderr
    assert (run / "derived.csv").read_bytes() == (run / "rec.csv").read_bytes()
    with open(run / "derived.csv") as f:
        rows = list(csv.DictReader(f))
    head = [
        "chain",
        "draw",
        "replica",
        "walker",
        "step",
        "zeta",
        "alpha",
        "log_prob",
        "accepted",
        "total",
    ]
    assert list(rows[0]) == head
    draws = chainyard.open_store(run / "t0.zarr").steps_done
    assert len(rows) == 2 * 8 * draws
    zeta = _expected_chains(run, "zeta")
    for row in rows[::97]:
        c, d = int(row["chain"]), int(row["draw"])
        assert c == int(row["replica"]) * 8 + int(row["walker"])
        assert float(row["zeta"]) == zeta[c, d]  # 17 significant digits: exact
    thin = run / "thinning.json"
    write_record(thin, "chainyard.thinning_decision", {"decision": {"factor": 3}}, [])
    proc = cli(
        "export", "r0.zarr", "r1.zarr", "--burn-in-record", "burn_in.json",
        "--thinning-record", thin.name, "-o", "thin.csv", cwd=run,
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    with open(run / "thin.csv") as f:
        thinned = list(csv.DictReader(f))
    discard = chainyard.open_store(run / "t0.zarr").attrs["derived"]["discard"]
    kept = range(discard, 800, 3)  # rows derive would keep: discard, discard + 3, ...
    assert len(thinned) == 2 * 8 * len(kept)
    assert sorted({int(r["step"]) for r in thinned}) == [k + 1 for k in kept]
    proc = cli("export", "r0.zarr", "r1.zarr", "--raw", "-o", "raw.csv", cwd=run)
    assert proc.returncode == 0, proc.stderr
    with open(run / "raw.csv") as f:
        assert sum(1 for _ in f) == 1 + 2 * 8 * 800


@pytest.mark.slow  # about 15 command-line processes
def test_export_refusals_are_one_line(run: Path) -> None:
    """Sampled stores without a record, other runs, bad extensions, existing files and
    stores as output are refused with one line; nothing is altered."""
    before = tree_snapshot(run / "t0.zarr")
    line = _one_line_error(cli("export", "r0.zarr", "r1.zarr", "-o", "a.nc", cwd=run), 4)
    assert "--burn-in-record" in line and "--raw" in line
    line = _one_line_error(cli("export", "r0.zarr", "t1.zarr", "-o", "a.nc", cwd=run), 4)
    assert "burn-in/thinning differ" in line
    other_bi = run / "other_burn_in.json"
    write_record(
        other_bi,
        "chainyard.burn_in_decision",
        {"decision": {"steps_discarded": 5}},
        [chainyard.open_store(run / "r0.zarr")],
    )
    line = _one_line_error(
        cli(
            "export", "r0.zarr", "r1.zarr", "--burn-in-record", other_bi.name, "-o", "a.nc", cwd=run
        ),
        4,
    )
    assert "decided on other stores than r1.zarr" in line
    line = _one_line_error(cli("export", "t0.zarr", "-o", "a.txt", cwd=run), 2)
    assert ".nc" in line and ".zarr" in line and ".csv" in line
    line = _one_line_error(cli("export", "t0.zarr", "t1.zarr", "-o", "t0.zarr", cwd=run), 4)
    assert "chainyard store" in line
    line = _one_line_error(cli("export", "t0.zarr", "-o", "t0.zarr/x.nc", cwd=run), 4)
    assert "inside the chainyard store" in line
    other = dict(CONFIG, seed=12)
    other_dir = run / "other"
    config = chainyard.load_config(write_run(other_dir, yaml.safe_dump(other), MODEL))
    chainyard.sample(config.with_steps(50), other_dir / "r1.zarr", replica=1, progress="off")
    line = _one_line_error(
        cli("export", "r0.zarr", "other/r1.zarr", "--raw", "-o", "a.nc", cwd=run), 4
    )
    assert "not a replica of the same run" in line and "seed" in line
    (run / "exists.csv").write_text("keep me\n")
    line = _one_line_error(cli("export", "t0.zarr", "-o", "exists.csv", cwd=run), 4)
    assert "--force" in line
    assert (run / "exists.csv").read_text() == "keep me\n"
    proc = cli("export", "t0.zarr", "-o", "exists.csv", "--force", cwd=run)
    assert proc.returncode == 0 and (run / "exists.csv").read_text().startswith("chain,")
    for _ in range(2):  # a zarr export is replaced with --force (swapped in whole)
        proc = cli("export", "t0.zarr", "-o", "again.zarr", "--force", cwd=run)
        assert proc.returncode == 0, proc.stderr
    (run / "mine.zarr").mkdir()
    (run / "mine.zarr" / "notes.txt").write_text("mine")
    line = _one_line_error(cli("export", "t0.zarr", "-o", "mine.zarr", "--force", cwd=run), 4)
    assert "not a zarr export written by chainyard" in line
    assert (run / "mine.zarr" / "notes.txt").read_text() == "mine"
    assert tree_snapshot(run / "t0.zarr") == before
    assert not list(run.glob(".*.tmp"))


def test_results_table_order_interval_and_formats(run: Path) -> None:
    """Rows follow the config's parameter order; --interval 0.8 gives lower_10pct/median/
    upper_90pct equal to numpy's quantiles of the pooled draws; --json and --csv carry the
    same table."""
    proc = cli("results-table", "t0.zarr", "t1.zarr", "--interval", "0.8", "--json", cwd=run)
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""
    table = json.loads(proc.stdout)
    assert [r["parameter"] for r in table["rows"]] == ["zeta", "alpha"]
    for row in table["rows"]:
        pooled = _expected_chains(run, row["parameter"]).ravel()
        # reference: numpy.quantile (linear interpolation) of every pooled draw
        expected = np.quantile(pooled, [0.1, 0.5, 0.9])
        got = [row["lower_10pct"], row["median"], row["upper_90pct"]]
        assert got == pytest.approx(expected, rel=1e-12)
        assert row["mean"] == pytest.approx(pooled.mean(), rel=1e-9)
        assert row["mcse_lower_10pct"] > 0
    assert table["rows"][0]["unit"] == "m"
    proc = cli(
        "results-table",
        "r0.zarr",
        "r1.zarr",
        "--burn-in-record",
        "burn_in.json",
        "--quantiles",
        "0.025,0.975",
        "--csv",
        cwd=run,
    )
    assert proc.returncode == 0, proc.stderr
    rows = list(csv.DictReader(proc.stdout.splitlines()))
    assert [r["parameter"] for r in rows] == ["zeta", "alpha"]
    assert list(rows[0]) == [
        "parameter", "unit", "mean", "sd", "lower_2.5pct", "upper_97.5pct", "mcse_mean",
        "mcse_sd", "mcse_lower_2.5pct", "mcse_upper_97.5pct", "bulk_ess", "tail_ess", "rhat",
        "nested_rhat",
    ]  # fmt: skip
    proc = cli("results-table", "t0.zarr", "t1.zarr", cwd=run)
    assert proc.returncode == 0 and proc.stdout.splitlines()[3].startswith("zeta")
    line = _one_line_error(cli("results-table", "t0.zarr", "--quantiles", "0.5,1.5", cwd=run), 2)
    assert "1.5" in line
    _one_line_error(cli("results-table", "t0.zarr", "--interval", "90", cwd=run), 2)


def test_old_command_name_prints_one_deprecation_line(run: Path) -> None:
    """`summarise` still works (same table) with one deprecation line on stderr, and is
    neither listed in --help nor offered in the usage error's choices."""
    new = cli("results-table", "t0.zarr", "t1.zarr", "--csv", cwd=run)
    old = cli("summarise", "t0.zarr", "t1.zarr", "--csv", cwd=run)
    assert old.returncode == 0 and old.stdout == new.stdout
    lines = old.stderr.strip().splitlines()
    assert len(lines) == 1 and "`chainyard summarise` is now `chainyard results-table`" in lines[0]
    listed = [line.split()[0] for line in cli("--help", cwd=run).stdout.splitlines()[5:] if line]
    assert "results-table" in listed and "summarise" not in listed
    wrong = cli("frobnicate", cwd=run)
    assert "'results-table'" in wrong.stderr and "summarise" not in wrong.stderr


def test_cli_table_and_summary_csv_have_the_same_columns(run: Path) -> None:
    """The workflow's summary.csv (built from a diagnostics record read back from sorted
    JSON) has exactly the CLI table's columns in the same order, rows in the config's
    order, and the same numbers."""
    stores = open_replicas([run / "t0.zarr", run / "t1.zarr"])
    record = run / "diagnostics.json"
    write_record(record, "chainyard.diagnostics", diagnose(stores), stores)
    write_summary_csv(
        summary_table(stores, diagnostics=read_record(record, "chainyard.diagnostics")),
        run / "summary.csv",
    )
    with open(run / "summary.csv", newline="") as f:
        workflow_rows = list(csv.DictReader(f))
    proc = cli("results-table", "t0.zarr", "t1.zarr", "--csv", cwd=run)
    assert proc.returncode == 0, proc.stderr
    cli_rows = list(csv.DictReader(proc.stdout.splitlines()))
    assert list(workflow_rows[0]) == list(cli_rows[0])
    assert [r["parameter"] for r in workflow_rows] == ["zeta", "alpha"]
    for a, b in zip(workflow_rows, cli_rows, strict=True):
        for key in a:
            if key in ("parameter", "unit"):
                assert a[key] == b[key]
            else:
                assert float(a[key]) == pytest.approx(float(b[key]), rel=1e-9), key
    text = cli("results-table", "t0.zarr", "t1.zarr", cwd=run).stdout.splitlines()
    assert text[1].split() == list(cli_rows[0])  # the text table: the same header
    header = text[1].split()
    for line in text[3:]:  # ESS as whole numbers, R-hats with 4 decimals
        cells = dict(zip(header, line.split(), strict=True))
        assert cells["bulk_ess"].replace(",", "").isdigit()
        assert len(cells["rhat"].split(".")[1]) >= 4


def test_plot_writes_the_four_pngs(run: Path) -> None:
    """`plot` writes traces, tau, pairs and acceptance PNGs (with reference values from a
    file); a reference file naming an unknown parameter is one line, exit 2."""
    (run / "refs.csv").write_text("parameter,value\nzeta,0.1\nalpha,-0.2\n")
    proc = cli(
        "plot",
        "r0.zarr",
        "r1.zarr",
        "--burn-in-record",
        "burn_in.json",
        "-o",
        "plots",
        "--reference-values",
        "refs.csv",
        cwd=run,
    )
    assert proc.returncode == 0, proc.stderr
    for name in ("traces", "tau", "pairs", "acceptance"):
        data = (run / "plots" / f"{name}.png").read_bytes()
        assert data.startswith(b"\x89PNG") and len(data) > 10_000
    (run / "bad.json").write_text('{"beta": 1.0}')
    line = _one_line_error(
        cli("plot", "t0.zarr", "-o", "plots2", "--reference-values", "bad.json", cwd=run), 2
    )
    assert "'beta' is not a parameter" in line
    line = _one_line_error(cli("plot", "t0.zarr", "-o", "t1.zarr", cwd=run), 4)
    assert "refusing to write the plots" in line


def test_burn_in_record_keeps_each_replicas_own_tau(run: Path) -> None:
    """Each per_replica entry of the default burn-in decision holds that replica's own tau
    (equal to emcee's autocorr.integrated_time, the reference), not the largest."""
    rec = read_record(run / "burn_in.json", "chainyard.burn_in_decision")
    entries = rec["decision"]["inputs"]["per_replica"]
    for r, entry in enumerate(entries):
        store = chainyard.open_store(run / f"r{r}.zarr")
        ref = emcee.autocorr.integrated_time(store.draws(), quiet=True)  # reference library
        taus = entry["inputs"]["tau_per_param"]
        assert [taus["zeta"], taus["alpha"]] == pytest.approx(ref, rel=1e-12)
    assert entries[0]["inputs"]["tau_per_param"] != entries[1]["inputs"]["tau_per_param"]


def test_python_api_matches_the_export(run: Path) -> None:
    """chainyard.to_datatree on sampled stores with the record equals Store.to_datatree of
    the derived stores (the same draws); a sampled store without a record is refused."""
    tree = chainyard.to_datatree(
        [run / "r0.zarr", run / "r1.zarr"], burn_in_record=run / "burn_in.json"
    )
    assert np.array_equal(tree["posterior"]["zeta"].values, _expected_chains(run, "zeta"))
    one = chainyard.to_datatree(chainyard.open_store(run / "t1.zarr"))
    assert list(one["posterior"]["replica"].values) == [1] * 8
    assert np.array_equal(one["posterior"]["zeta"].values, _expected_chains(run, "zeta")[8:])
    with pytest.raises(chainyard.StoreError, match="--raw"):
        chainyard.to_datatree(chainyard.open_store(run / "r0.zarr"))


def test_trace_panel_texts_do_not_overlap(run: Path) -> None:
    """Long parameter labels are panel titles that stay inside the figure and clear of the
    neighbouring panels' texts; the log-prob range covers the steps after the cut only."""
    from matplotlib.text import Text

    from chainyard.report.plots import trace_figure

    stores = open_replicas([run / "r0.zarr", run / "r1.zarr"])
    cut = read_record(run / "burn_in.json", "chainyard.burn_in_decision")["decision"]
    cut = int(cut["steps_discarded"])
    fig = trace_figure(stores, cut, references={"zeta": 0.0})
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    width = fig.bbox.width
    ticks = {id(t) for ax in fig.axes for t in ax.get_xticklabels() + ax.get_yticklabels()}
    texts = [  # titles, axis labels, annotations, legend entries (tick labels aside)
        t
        for t in fig.findobj(Text)
        if t.get_visible() and t.get_text().strip() and id(t) not in ticks
    ]
    boxes = [(t.get_text(), t.get_window_extent(renderer)) for t in texts]
    for name, box in boxes:
        assert box.x0 >= 0 and box.x1 <= width, name
    assert any("distance of the reflector" in name for name, _ in boxes)
    for i, (name_a, a) in enumerate(boxes):
        for name_b, b in boxes[i + 1 :]:
            assert not a.overlaps(b), (name_a, name_b)
    lp_axis = fig.axes[len(stores[0].param_names)]
    after = np.concatenate([s.log_prob(cut).mean(axis=1) for s in stores])
    low, high = lp_axis.get_ylim()
    assert low <= after.min() and after.max() <= high
    first = np.concatenate([s.log_prob(0, 1).mean(axis=1) for s in stores])
    assert first.min() < low  # the start lies far below: excluded from the range
