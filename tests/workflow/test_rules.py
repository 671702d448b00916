"""The rule library under real snakemake: caching, rerun triggers, resume after kills."""

from __future__ import annotations

import json
import os
import re
import signal
import time
from pathlib import Path

import numpy as np
import pytest

import chainyard
from tests.conftest import assert_same_store
from tests.patience import PATIENCE
from tests.workflow.conftest import (
    gauss_run,
    make_workflow,
    planned_jobs,
    popen_snakemake,
    snakemake,
    write_config,
)

pytestmark = pytest.mark.slow

SAMPLING_RULES = {"chainyard_sample"}


@pytest.fixture(scope="module")
def finished(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small two-replica workflow, run to completion once with --cores 2 (2 CPUs per
    sampling job: the model's calls may use 2 worker processes)."""
    folder = make_workflow(tmp_path_factory.mktemp("wf"), {"gauss": gauss_run()}, sample_threads=2)
    res = snakemake(folder, "--cores", "2")
    assert res.returncode == 0, res.stdout + res.stderr
    return folder


def test_outputs_and_records(finished: Path) -> None:
    """All outputs exist; decision records carry policy, reason, inputs and provenance; the
    selection record ties them to the sampled stores, and later steps read the selected steps
    of those stores (no copies: one store per replica)."""
    run = finished / "results" / "gauss"
    for rel in ("summary.csv", "diagnostics.txt", "diagnostics.json", "plots/traces.png",
                "plots/tau.png", "plots/pairs.png", "plots/acceptance.png",
                "decisions/burn_in.json", "decisions/thinning.json",
                "decisions/selection.json"):
        assert (run / rel).is_file(), rel
    burn = json.loads((run / "decisions" / "burn_in.json").read_text())
    assert burn["kind"] == "chainyard.burn_in_decision"
    assert burn["decision"]["reason"].startswith("Discarded ")
    assert len(burn["inputs"]) == 2 and all(len(i["sha256"]) == 64 for i in burn["inputs"])
    assert burn["provenance"]["software"]["emcee"] == "3.1.6"
    thin = json.loads((run / "decisions" / "thinning.json").read_text())
    sel = json.loads((run / "decisions" / "selection.json").read_text())
    assert sel["kind"] == "chainyard.selection"
    assert sel["steps_used"] == sel["steps_stored"] == 2000
    assert sel["first_kept"] == burn["decision"]["steps_discarded"]
    assert sel["every"] == thin["decision"]["factor"]
    assert sel["kept_per_replica"] == len(range(sel["first_kept"], 2000, sel["every"]))
    assert [i["path"] for i in sel["inputs"]][:2] == [
        f"results/gauss/draws/replica-{r}.zarr" for r in range(2)
    ]
    diag = json.loads((run / "diagnostics.json").read_text())
    assert set(diag["params"]) == {"x", "y"} and "verdict" in diag
    assert diag["selection"] == {k: sel[k] for k in ("steps_used", "first_kept", "every")}
    # the diagnostics are those of the selected steps (recomputed here from the raw store)
    from chainyard.analysis.diagnose import diagnose
    from chainyard.config import TargetsSpec

    raw = [chainyard.open_store(run / "draws" / f"replica-{r}.zarr") for r in range(2)]
    kept = [s.draws()[sel["first_kept"]:2000:sel["every"]] for s in raw]
    pooled = np.concatenate([k[:, :, 0].reshape(-1) for k in kept])
    assert diag["params"]["x"]["mean"] == pytest.approx(float(pooled.mean()), rel=1e-9)
    from chainyard.analysis.view import StoreWindow

    again = diagnose([StoreWindow(s, sel["first_kept"], 2000, sel["every"]) for s in raw],
                     TargetsSpec())
    assert again["params"]["x"]["ess_bulk"] == diag["params"]["x"]["ess_bulk"]
    # one store per replica: no trimmed or thinned copies
    assert sorted(p.name for p in run.iterdir() if p.is_dir()) == [
        ".resumable", "decisions", "draws", "plots"
    ]


def test_rerun_does_nothing(finished: Path) -> None:
    """A second run with no change has nothing to do."""
    res = snakemake(finished, "--cores", "2")
    assert res.returncode == 0
    assert "Nothing to be done" in res.stdout + res.stderr


def test_burn_in_change_does_not_resample(finished: Path) -> None:
    """Changing only the burn-in policy reruns trimming and what follows, never sampling."""
    write_config(finished, {"gauss": gauss_run(burn_in={"policy": "fixed", "steps": 300})})
    jobs = planned_jobs(finished)
    assert jobs == {"chainyard_analyse": 1, "chainyard_overview": 1, "chainyard_all": 1}
    write_config(finished, {"gauss": gauss_run()})
    assert planned_jobs(finished) == {}


def test_thinning_change_does_not_resample(finished: Path) -> None:
    """Changing only the thinning policy reruns the decisions and what follows, never
    sampling."""
    write_config(finished, {"gauss": gauss_run(thinning={"policy": "fixed", "factor": 5})})
    try:
        jobs = planned_jobs(finished)
        assert jobs == {"chainyard_analyse": 1, "chainyard_overview": 1, "chainyard_all": 1}
    finally:
        write_config(finished, {"gauss": gauss_run()})
    assert planned_jobs(finished) == {}


def test_jobs_per_run_at_most_replicas_plus_three(finished: Path) -> None:
    """A run costs one sampling job per replica and one more (decisions, diagnostics, summary
    and plots)."""
    write_config(finished, {"gauss": gauss_run(replicas=4, seed=8)})
    try:
        jobs = planned_jobs(finished)
    finally:
        write_config(finished, {"gauss": gauss_run()})
    per_run = {k: v for k, v in jobs.items() if k not in ("chainyard_all", "chainyard_overview")}
    assert per_run == {"chainyard_sample": 4, "chainyard_analyse": 1}
    assert sum(per_run.values()) <= 4 + 3


def test_more_replicas_samples_only_new_ones(finished: Path) -> None:
    """Raising the replica count samples only the new replica."""
    write_config(finished, {"gauss": gauss_run(replicas=3)})
    try:
        assert planned_jobs(finished).get("chainyard_sample") == 1
    finally:
        write_config(finished, {"gauss": gauss_run()})


def test_sample_threads_change_reruns_nothing(finished: Path) -> None:
    """The sampling jobs got the rule's threads as CPUs (their cheap vectorised model stays
    in the job's process, said in one line); changing them is not a rerun trigger, since the
    worker count never changes a draw."""
    logs = finished / "results" / "logs" / "gauss"
    for replica in (0, 1):
        log = (logs / f"sample-replica-{replica}.log").read_text()
        auto = [ln for ln in log.splitlines() if "workers auto:" in ln]
        assert len(auto) == 1 and "evaluating in this process" in auto[0], log
    for threads in (1, 3):
        write_config(finished, {"gauss": gauss_run()}, sample_threads=threads)
        assert planned_jobs(finished) == {}


def test_model_change_reruns_sampling(finished: Path) -> None:
    """Editing the model file reruns sampling (input content changed)."""
    model = finished / "models" / "gauss.py"
    original = model.read_text()
    model.write_text(original + "\n# tweak\n")
    try:
        assert planned_jobs(finished).get("chainyard_sample") == 2
    finally:
        model.write_text(original)


def test_params_are_plain_sorted_json(finished: Path) -> None:
    """Rule params are JSON strings with sorted keys (rerun detection sees every change)."""
    from chainyard.workflow import load_workflow_config
    from chainyard.workflow.config import RunEntry

    cfg = {"chainyard": {"runs": {"gauss": gauss_run()}}}
    cwd = os.getcwd()
    os.chdir(finished)
    try:
        entry: RunEntry = load_workflow_config(cfg)["gauss"]
    finally:
        os.chdir(cwd)
    text = entry.param("sampling")
    assert json.dumps(json.loads(text), sort_keys=True, separators=(",", ":")) == text
    assert "burn_in" not in json.loads(text) and "targets" not in json.loads(text)
    # the sampling rule gets the same settings one section per param, joined back exactly
    from types import SimpleNamespace

    from chainyard.workflow.config import SAMPLING_SECTIONS, sampling_settings_of

    params = SimpleNamespace(**{k: entry.sampling_section(k) for k in SAMPLING_SECTIONS})
    assert sampling_settings_of(params) == text


def test_seed_change_reason_names_only_the_seed(finished: Path) -> None:
    """A changed sampling setting reruns sampling, and the rerun reason shows the changed
    section (one param per section of the sampling settings), not the whole run's settings."""
    write_config(finished, {"gauss": gauss_run(seed=8)})
    try:
        res = snakemake(finished, "-n", "--rerun-triggers", "params")
        text = res.stdout + res.stderr
        assert res.returncode == 0, text
        assert "chainyard_sample" in text
        reasons = [ln for ln in text.splitlines() if "params changed" in ln.lower()
                   or "params have changed" in ln.lower()]
        assert reasons, text
        changed = " ".join(reasons)
        assert """before: '{"seed":7}' now: '{"seed":8}'""" in changed, changed
        for untouched in ("parameters", "storage", "sampler"):
            assert untouched not in changed, changed
        assert max(len(ln) for ln in reasons) < 400, changed
    finally:
        write_config(finished, {"gauss": gauss_run()}, sample_threads=2)
    assert planned_jobs(finished) == {}


def test_lint_and_report(finished: Path) -> None:
    """`snakemake --lint` is clean and `--report` writes one self-contained HTML file."""
    lint = snakemake(finished, "--lint")
    assert lint.returncode == 0
    assert "Congratulations, your workflow is in a good condition!" in lint.stdout + lint.stderr
    res = snakemake(finished, "--report", "report.html")
    assert res.returncode == 0, res.stdout + res.stderr
    html = (finished / "report.html").read_text()
    assert "traces.png" in html and "summary.csv" in html
    assert "data:image/png;base64" in html or "base64" in html


def test_overview_table_and_report_opening_page(finished: Path) -> None:
    """results/runs.csv holds one row per run from its diagnostics; the report opens on the
    same table, linking to the run's plots and tables."""
    import csv

    with open(finished / "results" / "runs.csv", newline="") as f:
        (row,) = list(csv.DictReader(f))
    diag = json.loads((finished / "results/gauss/diagnostics.json").read_text())
    assert row["run"] == "gauss"
    assert row["verdict"] == ("targets met" if diag["verdict"]["ok"] else "targets not met")
    worst = max(diag["params"], key=lambda p: diag["params"][p]["rhat"])
    assert row["worst_rhat_parameter"] == worst
    assert float(row["worst_rhat"]) == pytest.approx(diag["params"][worst]["rhat"], abs=1e-4)
    assert row["steps"] == "2000" and row["replicas"] == "2"
    if not (finished / "report.html").exists():
        assert snakemake(finished, "--report", "report.html").returncode == 0
    html = (finished / "report.html").read_text()
    start = html.index("var workflow_desc")
    page = html[start:html.index("\n", start)]
    assert "<h1 class=\\\"title\\\">Runs</h1>" in page and ">gauss</td>" in page
    assert "showResultInfo('results/gauss/plots/traces.png')" in page
    assert "system-message" not in page
    # the figure across runs, embedded above the table; the page lifts the narrow column
    assert (finished / "results" / "runs.png").read_bytes().startswith(b"\x89PNG")
    assert "data:image/png;base64," in page and "chainyard-overview" in page
    # summary.csv has the results table's columns (chainyard results-table)
    from chainyard.analysis.summary_table import DEFAULT_QUANTILES, table_columns

    with open(finished / "results/gauss/summary.csv", newline="") as f:
        assert next(csv.reader(f)) == table_columns(DEFAULT_QUANTILES)


def test_logs_show_progress_lines(finished: Path) -> None:
    """Sampling logs hold plain progress lines (steps, rate, acceptance, ETA), no \\r."""
    log = (finished / "results" / "logs" / "gauss" / "sample-replica-0.log").read_text()
    assert "steps/s | acceptance" in log and "ETA" in log
    assert "\r" not in log


def test_steps_increase_extends_exactly(tmp_path: Path) -> None:
    """Raising steps extends the chains; the result equals a direct run of the new length."""
    folder = make_workflow(tmp_path / "wf", {"gauss": gauss_run(steps=1000, replicas=1)})
    assert snakemake(folder, "--cores", "1").returncode == 0
    write_config(folder, {"gauss": gauss_run(steps=2500, replicas=1)})
    res = snakemake(folder, "--cores", "1")
    assert res.returncode == 0, res.stdout + res.stderr
    log = (folder / "results" / "logs" / "gauss" / "sample-replica-0.log").read_text()
    assert "extending replica 0 at step 1,000 of 2,500" in log
    direct = make_workflow(tmp_path / "direct", {"gauss": gauss_run(steps=2500, replicas=1)})
    assert snakemake(direct, "--cores", "1").returncode == 0
    rel = Path("results/gauss/draws/replica-0.zarr")
    assert_same_store(folder / rel, direct / rel)


SUICIDAL_MODEL = """
import os
import signal
from pathlib import Path

import numpy as np

MARK = Path(__file__).with_name("attempts")
ATTEMPT = len(MARK.read_text()) if MARK.exists() else 0
MARK.write_text("x" * (ATTEMPT + 1))
CALLS = 0

def log_prob(theta, data):
    global CALLS
    CALLS += 1
    if ATTEMPT == 0 and CALLS == 1500:
        os.kill(os.getpid(), signal.SIGKILL)   # the first attempt dies mid-run
    return -0.5 * np.sum(theta * theta, axis=1)
"""


def test_retry_resumes_within_one_invocation(tmp_path: Path) -> None:
    """A job killed by SIGKILL is retried (runtime grows) and resumes; result is exact."""
    run = gauss_run(steps=3000, replicas=1,
                    storage={"fsync": False, "commit_every_steps": 100})
    run["model"]["log_prob"] = "models/suicidal.py:log_prob"
    folder = make_workflow(tmp_path / "wf", {"gauss": run},
                           models={"suicidal.py": SUICIDAL_MODEL}, sample_retries=2)
    res = snakemake(folder, "--cores", "1")
    assert res.returncode == 0, res.stdout + res.stderr
    log = (folder / "results" / "logs" / "gauss" / "sample-replica-0.log").read_text()
    # two log-prob calls per step (one per half-ensemble): the kill lands just before step
    # 750. Commits come every 100 steps and whenever commit_every_seconds has passed, and are
    # written in the background, so how far back the last finished one lies depends on the
    # machine's speed (580 seen on a loaded one); what holds is that the retry resumes from a
    # commit (not from 0) made before the kill, and (below) that the result is exact
    m = re.search(r"resuming replica 0 at step ([0-9,]+) of 3,000", log)
    assert m and 0 < int(m.group(1).replace(",", "")) < 750, log
    reference = make_workflow(tmp_path / "ref", {"gauss": gauss_run(steps=3000, replicas=1)})
    assert snakemake(reference, "--cores", "1").returncode == 0
    rel = Path("results/gauss/draws/replica-0.zarr")
    a, b = chainyard.open_store(folder / rel), chainyard.open_store(reference / rel)
    assert np.array_equal(a.draws(), b.draws()) and np.array_equal(a.log_prob(), b.log_prob())


SLOW_MODEL = """
import os
import time
from pathlib import Path

import numpy as np

Path(__file__).with_name("pid").write_text(str(os.getpid()))
HOLD = Path(__file__).with_name("hold")  # while it exists, crawl after 400 steps
CALLS = [0]

def log_prob(theta, data):
    CALLS[0] += 1
    time.sleep(0.05 if CALLS[0] > 800 and HOLD.exists() else 0.002)
    return -0.5 * np.sum(theta * theta, axis=1)
"""


def _wait_for_file(path: Path, timeout: float = PATIENCE) -> None:
    deadline = time.monotonic() + timeout
    while not path.exists():
        assert time.monotonic() < deadline, f"{path} did not appear"
        time.sleep(0.05)


def _wait_for_steps(store: Path, steps: int, timeout: float = PATIENCE) -> None:
    deadline = time.monotonic() + timeout
    while True:
        try:
            if chainyard.open_store(store).steps_done >= steps:
                return
        except chainyard.StoreError:
            pass
        assert time.monotonic() < deadline
        time.sleep(0.05)


def _wait_until_gone(pid: int, timeout: float = PATIENCE) -> None:
    """Wait until process ``pid`` has ended (gone, or a zombie: its files are closed)."""
    deadline = time.monotonic() + timeout
    while True:
        try:
            stat = Path(f"/proc/{pid}/stat").read_text()
        except OSError:
            return
        if stat.rsplit(")", 1)[1].split()[0] == "Z":
            return
        assert time.monotonic() < deadline, f"process {pid} did not end"
        time.sleep(0.05)


def _slow_workflow(folder: Path, **settings: object) -> Path:
    run = gauss_run(steps=1500, replicas=1,
                    storage={"fsync": False, "commit_every_steps": 100})
    run["model"]["log_prob"] = "models/slow.py:log_prob"
    return make_workflow(folder, {"gauss": run}, models={"slow.py": SLOW_MODEL}, **settings)


@pytest.mark.parametrize("flags", [(), ("--rerun-incomplete",)], ids=["plain", "incomplete"])
def test_sigkill_job_then_rerun_resumes(tmp_path: Path, flags: tuple[str, ...]) -> None:
    """SIGKILL of a sampling job, then snakemake again (plain / --rerun-incomplete): exact."""
    folder = _slow_workflow(tmp_path / "wf", sample_retries=0)
    hold = folder / "models" / "hold"
    hold.touch()  # the job cannot end before it is killed, however loaded the machine
    proc = popen_snakemake(folder, "--cores", "1")
    resumable = folder / "results" / "gauss" / ".resumable" / "replica-0.zarr"
    _wait_for_steps(resumable, 300)
    os.kill(int((folder / "models" / "pid").read_text()), signal.SIGKILL)
    hold.unlink()
    proc.wait(timeout=PATIENCE)
    assert proc.returncode != 0
    done = chainyard.open_store(resumable).steps_done
    assert 300 <= done < 1500
    res = snakemake(folder, "--cores", "1", *flags)
    assert res.returncode == 0, res.stdout + res.stderr
    log = (folder / "results" / "logs" / "gauss" / "sample-replica-0.log").read_text()
    assert f"resuming replica 0 at step {done:,} of 1,500" in log
    reference = _slow_workflow(tmp_path / "ref")
    # the reference needs no slowness: compare with a direct API run of the same settings
    from chainyard.workflow import load_workflow_config

    cwd = os.getcwd()
    os.chdir(reference)
    try:
        entry = load_workflow_config(
            {"chainyard": {"runs": {"gauss": json.loads(
                json.dumps(_run_of(reference)))}}})["gauss"]
        chainyard.sample(entry.config, reference / "direct.zarr", 0, progress="off")
    finally:
        os.chdir(cwd)
    assert_same_store(folder / "results/gauss/draws/replica-0.zarr", reference / "direct.zarr")


def _run_of(folder: Path) -> dict[str, object]:
    import yaml

    cfg = yaml.safe_load((folder / "config" / "config.yaml").read_text())
    return cfg["chainyard"]["runs"]["gauss"]


def test_killed_snakemake_orphan_holds_lock(tmp_path: Path) -> None:
    """Snakemake's main process SIGKILLed: after --unlock, a rerun while the orphan job
    still runs fails fast on the store lock; once the orphan ends, a rerun resumes."""
    folder = _slow_workflow(tmp_path / "wf", sample_retries=0)
    proc = popen_snakemake(folder, "--cores", "1")
    resumable = folder / "results" / "gauss" / ".resumable" / "replica-0.zarr"
    _wait_for_steps(resumable, 200)
    orphan = int((folder / "models" / "pid").read_text())
    # paused, the orphan keeps its lock however slowly the commands below run on a loaded
    # machine (running on, it could finish its steps before the rerun tries the lock)
    os.kill(orphan, signal.SIGSTOP)
    proc.send_signal(signal.SIGKILL)  # the main process only; the job stays as an orphan
    proc.wait(timeout=PATIENCE)
    assert snakemake(folder, "--unlock").returncode == 0
    res = snakemake(folder, "--cores", "1")
    assert res.returncode != 0
    log = (folder / "results" / "logs" / "gauss" / "sample-replica-0.log").read_text()
    assert "another process is writing this store" in log
    os.kill(orphan, signal.SIGKILL)
    _wait_until_gone(orphan)  # its lock goes with it (a fixed sleep was too short under load)
    res = snakemake(folder, "--cores", "1")
    assert res.returncode == 0, res.stdout + res.stderr
    assert chainyard.open_store(folder / "results/gauss/draws/replica-0.zarr").steps_done == 1500


def test_config_typo_stops_before_any_job(tmp_path: Path) -> None:
    """A misspelt key stops the workflow at start with a message naming the key."""
    run = gauss_run()
    run["sampler"]["walkerz"] = 16
    folder = make_workflow(tmp_path, {"gauss": run})
    res = snakemake(folder, "--cores", "1")
    out = res.stdout + res.stderr
    assert res.returncode != 0
    assert "walkerz" in out
    assert not (folder / "results").exists()


def test_jobs_are_independent_with_jobs_flag(tmp_path: Path) -> None:
    """With --jobs 4 on the local executor, replicas sample in parallel and agree with
    serial runs: no shared in-process state, each store written only by its own job."""
    folder = make_workflow(tmp_path / "par", {"gauss": gauss_run(replicas=4)})
    res = snakemake(folder, "--jobs", "4", "--cores", "4")
    assert res.returncode == 0, res.stdout + res.stderr
    serial = make_workflow(tmp_path / "ser", {"gauss": gauss_run(replicas=4)})
    assert snakemake(serial, "--cores", "1").returncode == 0
    for r in range(4):
        rel = Path(f"results/gauss/draws/replica-{r}.zarr")
        assert_same_store(folder / rel, serial / rel)


def test_between_workflow_cache_hit(tmp_path: Path) -> None:
    """With --cache, a second workflow with the same sampling settings reuses the draws."""
    cache = tmp_path / "cache"
    cache.mkdir()
    env = {"SNAKEMAKE_OUTPUT_CACHE": str(cache)}
    first = make_workflow(tmp_path / "one", {"gauss": gauss_run(replicas=1)})
    res = snakemake(first, "--cores", "1", "--cache", env=env)
    assert res.returncode == 0, res.stdout + res.stderr
    second = make_workflow(tmp_path / "two", {"gauss": gauss_run(replicas=1)})
    res = snakemake(second, "--cores", "1", "--cache", env=env)
    assert res.returncode == 0, res.stdout + res.stderr
    assert (second / "results/gauss/draws/replica-0.zarr/commit.json").is_symlink()
    log = second / "results" / "logs" / "gauss" / "sample-replica-0.log"
    assert not log.exists() or log.read_text() == ""  # the sampling job never ran
    rel = Path("results/gauss/draws/replica-0.zarr")
    assert_same_store(first / rel, second / rel)
    # a different replica must not hit the entry (replica is passed through params)
    third = make_workflow(tmp_path / "three", {"gauss": gauss_run(replicas=2)})
    res = snakemake(third, "--cores", "1", "--cache", env=env)
    assert res.returncode == 0
    logs = third / "results" / "logs" / "gauss"
    assert "starting replica 1" in (logs / "sample-replica-1.log").read_text()
    assert len(list(cache.iterdir())) == 2
