"""The example workflow on a real (one-node, loopback) SLURM cluster with the shipped profile.

One Snakemake run with ``--executor slurm`` and ``--workflow-profile profiles/slurm`` of a
reduced example (the cooling run, 2 replicas), during which the first replica's sampling job is
cancelled with ``scancel`` as a user would. Checked against SLURM's own records (the
controller's job list and its job completion log) and against a local run of the same
workflow:

* every job Snakemake ran (all but the target rule ``all``) was a SLURM job that completed;
* threads, runtime and mem_mb of every job reached SLURM (CPUs, time limit, memory);
* the cancelled job was noticed (no hang: the run is bounded by a timeout) and retried with
  twice the wall time, and the retry resumed from the store's last commit;
* every published store is bitwise equal to the one of the uninterrupted local run.
"""

from __future__ import annotations

import math
import re
import shutil
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

import chainyard
from tests.cluster.slurm_cluster import NODE, PREFIX, SlurmCluster, owned_folder
from tests.cluster.workflow_runs import (
    EXAMPLE,
    finish,
    reduced_example,
    start_snakemake,
    stop_group,
    submitted_jobs,
    wait_for,
    zarr_stores,
)
from tests.conftest import assert_same_store, base_config, cli, write_run
from tests.patience import PATIENCE
from tests.workflow.conftest import gauss_run, make_workflow, planned_jobs, snakemake

STEPS = 2000
REPLICAS = 2
#: 2 ms per log-prob call, two calls per step: about 8 s of sampling per replica
PAUSE = 0.002
#: first-attempt wall time of the sampling rule (minutes); attempt k gets k times this (a
#: limit only for a hang: a loaded machine gets the test patience, see tests/patience.py)
RUNTIME = max(7, math.ceil(PATIENCE / 60))
SAMPLE_THREADS = 2
SAMPLE_MEM_MB = 2000  # the shipped profile's set-resources for chainyard_sample
CANCELLED = "chainyard_sample", "cooling_0"
#: bounds on the whole SLURM run and on the local run (seconds): a hang fails, never blocks CI
SLURM_RUN_TIMEOUT = PATIENCE
LOCAL_RUN_TIMEOUT = PATIENCE
#: the polling settings a test can afford (the shipped profile's are for real clusters)
FAST_POLLING = ("--slurm-init-seconds-before-status-checks", "1",
                "--seconds-between-status-checks", "1")


@pytest.fixture
def work() -> Iterator[Path]:
    """A temporary folder removed afterwards, pass or fail."""
    folder = owned_folder(f"{PREFIX}-workflow-")
    try:
        yield folder
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def job_stats(log_text: str) -> dict[str, int]:
    """The job counts per rule from the "Job stats" table at the start of a run's log."""
    block = log_text.split("Job stats:", 1)[1].splitlines()[3:]
    counts: dict[str, int] = {}
    for line in block:
        parts = line.split()
        if len(parts) != 2 or parts[0] == "total":
            break
        counts[parts[0]] = int(parts[1])
    return counts


def committed_steps(store: Path) -> int:
    """Steps committed in a store being written (0 while it does not exist yet)."""
    try:
        return chainyard.open_store(store).steps_done
    except Exception:  # not created yet, or caught between two files of its first commit
        return 0


def cancel_when_committed(slurm: SlurmCluster, folder: Path) -> tuple[str, int]:
    """Wait for the first replica's sampling job to run and commit, then ``scancel`` it.

    Returns the SLURM job id and the steps committed just before the cancel.
    """
    comment = f"rule_{CANCELLED[0]}_wildcards_{CANCELLED[1]}"
    store = folder / "results" / "cooling" / ".resumable" / "replica-0.zarr"

    def running() -> str | None:
        return next((jid for jid, job in slurm.jobs().items()
                     if job["comment"] == comment and job["state"] == "RUNNING"), None)

    hold = folder / "models" / "hold"
    hold.touch()  # the job crawls after 300 steps until cancelled: it cannot end first
    slurm_id = wait_for("the sampling job to run on the cluster", running, timeout=PATIENCE)
    steps = wait_for("the sampling job's first commit", lambda: committed_steps(store),
                     timeout=PATIENCE, interval=0.1)
    res = slurm.command("scancel", slurm_id)
    hold.unlink()  # the retry runs at the usual pace
    assert res.returncode == 0, res.stderr
    assert steps < STEPS, "the sampling job finished before it could be cancelled"
    return slurm_id, steps


@pytest.mark.slow
def test_example_workflow_on_slurm(slurm: SlurmCluster, work: Path) -> None:
    on_slurm = reduced_example(work / "slurm", steps=STEPS, replicas=REPLICAS, pause=PAUSE,
                               runtime_minutes=RUNTIME)
    local = reduced_example(work / "local", steps=STEPS, replicas=REPLICAS, pause=PAUSE,
                            runtime_minutes=RUNTIME)
    threads = ("--set-threads", f"chainyard_sample={SAMPLE_THREADS}")
    started = time.monotonic()
    proc, log = start_snakemake(on_slurm, "--workflow-profile", "profiles/slurm",
                                *FAST_POLLING, *threads, env=slurm.env())
    local_proc, local_log = start_snakemake(local, "--cores", "2", *threads)
    try:
        cancelled_id, steps_before_cancel = cancel_when_committed(slurm, on_slurm)
        code = finish(proc, SLURM_RUN_TIMEOUT - (time.monotonic() - started))
        local_code = finish(local_proc, LOCAL_RUN_TIMEOUT)
    finally:
        stop_group(proc)
        stop_group(local_proc)
    text = log.read_text()
    assert code is not None, (f"the SLURM run did not end in {SLURM_RUN_TIMEOUT} s (a cancelled "
                              f"job not noticed?):\n{text[-3000:]}")
    assert code == 0, text[-5000:]
    assert local_code == 0, local_log.read_text()[-3000:]
    print(f"SLURM run {time.monotonic() - started:.0f} s")

    # every job but the target rule ran as a SLURM job, as many as Snakemake planned
    jobs = submitted_jobs(text)
    planned = {rule: n for rule, n in job_stats(text).items() if rule != "all"}
    ran: dict[str, int] = {}
    for job in jobs.values():
        if job.rule != "all":
            ran[job.rule] = ran.get(job.rule, 0) + 1
            assert job.slurm_ids, f"{job.rule} {job.wildcards} was not submitted to SLURM"
    assert ran == planned
    slurm_ids = {i for job in jobs.values() for i in job.slurm_ids}
    done = wait_for("the job completion log", lambda: (
        slurm.completed_jobs() if slurm_ids <= slurm.completed_jobs().keys() else None),
        PATIENCE)
    known = slurm.jobs()  # the controller's records (kept MinJobAge seconds)
    for job in (j for j in jobs.values() if j.rule != "all"):
        values = "_".join(v.split("=", 1)[1] for v in job.wildcards.split(", ") if "=" in v)
        for attempt, slurm_id in enumerate(job.slurm_ids, start=1):
            record = done[slurm_id]
            # the plugin's job comment names the rule and (where there are any) its wildcards
            comment = f"rule_{job.rule}" + (f"_wildcards_{values}" if values else "")
            assert known[slurm_id]["comment"] == comment
            last = attempt == len(job.slurm_ids)
            assert record["JobState"] == ("COMPLETED" if last else "CANCELLED"), record
            assert record["NodeList"] == NODE, record
            # resources: threads -> CPUs, mem_mb -> memory, runtime (minutes) -> time limit
            runtime = int(job.resources["runtime"])
            if job.rule == "chainyard_sample":
                assert (job.threads, int(job.resources["mem_mb"])) == (SAMPLE_THREADS,
                                                                       SAMPLE_MEM_MB)
                runtime = RUNTIME * attempt
            assert int(record["ProcCnt"]) == job.threads, record
            assert f"mem={job.resources['mem_mb']}M" in record["Tres"], record
            assert int(record["TimeLimit"]) == runtime, (job.rule, attempt, record)

    # the cancelled sampling job was noticed, retried with more time, and resumed
    retried = [j for j in jobs.values() if len(j.slurm_ids) > 1]
    assert [(j.rule, j.slurm_ids[0]) for j in retried] == [(CANCELLED[0], cancelled_id)]
    assert re.search(rf"SLURM-job '{cancelled_id}' failed, SLURM status is: 'CANCELLED'", text)
    segments = chainyard.open_store(
        on_slurm / "results/cooling/draws/replica-0.zarr").commit_record["segments"]
    assert [s["kind"] for s in segments] == ["start", "resume"], segments
    assert steps_before_cancel <= segments[1]["from_step"] < STEPS
    assert segments[0]["to_step"] == segments[1]["from_step"]
    assert segments[1]["to_step"] == STEPS

    # every published store equals the local, uninterrupted run's bit for bit
    stores = zarr_stores(on_slurm / "results")
    assert stores == zarr_stores(local / "results")
    assert len(stores) >= REPLICAS
    for rel in stores:
        assert_same_store(on_slurm / "results" / rel, local / "results" / rel)
    # and a rerun finds nothing to do
    again = snakemake(on_slurm, "-n", "--workflow-profile", "profiles/slurm", *threads,
                      env=slurm.env())
    assert "Nothing to be done" in again.stdout + again.stderr, again.stdout + again.stderr
    summary = Path("results/cooling/summary.csv")
    if (local / summary).exists():
        assert (on_slurm / summary).read_bytes() == (local / summary).read_bytes()


@pytest.mark.slow
def test_job_groups_on_slurm(slurm: SlurmCluster, work: Path) -> None:
    """A run's replicas in one SLURM job and all its later steps in another.

    Without groups the same workflow is one SLURM job per Snakemake job (the test above).
    """
    folder = make_workflow(work / "grouped", {"a": gauss_run(steps=1000)})
    shutil.copytree(EXAMPLE / "profiles" / "slurm", folder / "profiles" / "slurm")
    plan = planned_jobs(folder)
    rules = [rule for rule in plan if rule != "all"]
    groups = [f"{r}={'sampling' if r == 'chainyard_sample' else 'steps'}" for r in rules]
    proc, log = start_snakemake(
        folder, "--workflow-profile", "profiles/slurm", *FAST_POLLING, "--groups", *groups,
        "--group-components", f"sampling={plan['chainyard_sample']}", env=slurm.env())
    try:
        code = finish(proc, SLURM_RUN_TIMEOUT)
    finally:
        stop_group(proc)
    text = log.read_text()
    assert code == 0, text[-5000:]
    run_id = re.search(r"^SLURM run ID: (\S+)", text, re.MULTILINE)
    assert run_id is not None, text[:3000]
    ours = {jid: job for jid, job in slurm.jobs().items() if job["name"] == run_id[1]}
    done = wait_for("the job completion log", lambda: (
        slurm.completed_jobs() if ours.keys() <= slurm.completed_jobs().keys() else None),
        PATIENCE)
    assert sum(plan.values()) > 2 * len(ours)
    assert sorted(job["comment"].split("_", 2)[1] for job in ours.values()) == [
        "sampling", "steps"]
    for jid in ours:
        assert done[jid]["JobState"] == "COMPLETED", done[jid]
    # the sampling group runs the replicas side by side: their threads and memory add up
    sampling = next(jid for jid, job in ours.items() if "sampling" in job["comment"])
    assert int(done[sampling]["ProcCnt"]) == plan["chainyard_sample"]
    assert f"mem={plan['chainyard_sample'] * SAMPLE_MEM_MB}M" in done[sampling]["Tres"]
    for replica in range(plan["chainyard_sample"]):
        store = chainyard.open_store(folder / f"results/a/draws/replica-{replica}.zarr")
        assert store.steps_done == 1000


#: the model of the Dask-on-SLURM run: about 0.2 ms per walker (a run of a few seconds)
DASK_MODEL = """
import time
import numpy as np

def log_prob(theta, data):
    t = time.perf_counter()
    while time.perf_counter() - t < 2e-4:
        pass
    return -0.5 * float(np.dot(theta, theta))
"""


def documented_cluster_script() -> str:
    """docs/dask.md's dask-jobqueue script, with this machine's values put in: our virtual
    environment, 2 jobs (the node's CPUs) and a short wall time."""
    text = (Path(__file__).parents[2] / "docs" / "dask.md").read_text()
    section = text.split("## On SLURM with dask-jobqueue", 1)[1]
    script = section.split("```python\n", 1)[1].split("```", 1)[0]
    venv = Path(sys.prefix) / "bin" / "activate"
    for old, new in (
        ("/path/to/venv/bin/activate", str(venv)),
        ("jobs=8", "jobs=2"),
        ('walltime="04:00:00"', 'walltime="00:30:00"'),
    ):
        assert old in script, f"docs/dask.md's example no longer has {old!r}"
        script = script.replace(old, new)
    return script


@pytest.mark.slow
def test_dask_jobqueue_example_on_slurm(slurm: SlurmCluster, work: Path) -> None:
    """docs/dask.md's example as a user runs it: a Dask cluster of SLURM jobs started with
    dask-jobqueue, and ``sample --workers dask://ADDRESS`` against it. The walkers are
    evaluated in SLURM jobs that ran on the node, and the draws are bitwise the serial ones."""
    pytest.importorskip("dask_jobqueue")
    from distributed import Client

    (work / "dask_cluster.py").write_text(documented_cluster_script())
    config = base_config(storage={"chunk_steps": 50, "commit_every_steps": 25})
    config["sampler"] = {"walkers": 8, "steps": 100}
    run = write_run(work / "run", config, model=DASK_MODEL)
    before = set(slurm.jobs())
    proc = subprocess.Popen(
        [sys.executable, "dask_cluster.py"], cwd=work, env=slurm.env(), text=True,
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
    )
    try:
        assert proc.stdout is not None
        address = proc.stdout.readline().strip()
        assert address.startswith("tcp://"), (address, proc.stderr and proc.stderr.read())
        with Client(address, timeout=PATIENCE) as client:
            client.wait_for_workers(2, timeout=PATIENCE)  # the two SLURM jobs started
        serial = cli("sample", str(run), "--out", str(work / "serial.zarr"))
        assert serial.returncode == 0, serial.stderr
        pooled = cli("sample", str(run), "--out", str(work / "dask.zarr"),
                     "--workers", f"dask://{address.removeprefix('tcp://')}")
        assert pooled.returncode == 0, pooled.stderr
        assert "on the Dask cluster at" in pooled.stderr + pooled.stdout
        assert_same_store(work / "serial.zarr", work / "dask.zarr")
        workers = {jid: job for jid, job in slurm.jobs().items() if jid not in before}
        assert len(workers) == 2 and all(j["state"] == "RUNNING" for j in workers.values()), (
            workers
        )
    finally:
        if proc.poll() is None:
            proc.communicate("\n", timeout=PATIENCE)  # "press Enter to stop the cluster"
    assert proc.returncode == 0
    wait_for("the worker jobs to end", lambda: not [
        j for jid, j in slurm.jobs().items() if jid not in before and j["state"] == "RUNNING"
    ], timeout=PATIENCE)
