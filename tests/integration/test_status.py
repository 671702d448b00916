"""`chainyard status` on a results folder laid out as the rules lay it out, filled by real runs.

Stores come from real `chainyard sample` processes: one finished and published, one killed
with SIGKILL after its first commits (its marker stays: a stale lock), one still sampling, one
whose model raised (its log holds the error line), one with the failure note a workflow job
writes. `status` runs in its own process while the sampler writes.
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

import pytest

from tests.conftest import SLOW_MODEL, base_config, cli, write_run
from tests.patience import PATIENCE

pytestmark = pytest.mark.slow  # real samplers (one kept running while the tests look)

BAD_MODEL = """
def log_prob(theta, data):
    raise ZeroDivisionError("the model divided by zero")
"""


def _sample_cmd(config: Path, out: Path) -> list[str]:
    return [
        sys.executable,
        "-m",
        "chainyard.cli",
        "sample",
        str(config),
        "--out",
        str(out),
        "--progress",
        "off",
    ]


def _steps(store: Path) -> int:
    try:
        return int(json.loads((store / "commit.json").read_text())["steps_done"])
    except (OSError, ValueError, KeyError):
        return 0


def _wait(condition, what: str, limit: float = PATIENCE) -> None:  # type: ignore[no-untyped-def]
    """Wait for ``condition()`` (the limit only turns a hang into a failure)."""
    end = time.monotonic() + limit
    while not condition():
        if time.monotonic() > end:
            raise AssertionError(f"gave up waiting for {what}")
        time.sleep(0.1)


def _status(results: Path, *args: str) -> list[dict]:  # type: ignore[type-arg]
    res = cli("status", str(results), "--json", *args)
    assert res.returncode == 0, res.stderr
    return json.loads(res.stdout)


@pytest.fixture(scope="module")
def results(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    """A results folder with done, stale, sampling, failed (log) and failed (note) runs."""
    root = tmp_path_factory.mktemp("status")
    res = root / "results"
    slow = base_config(
        sampler={"walkers": 16, "steps": 400_000},
        storage={"commit_every_seconds": 0.3, "fsync": False},
    )
    # done: two replicas sampled, then published as the rule does (hard-linked copy)
    done_cfg = write_run(
        root / "cfg_done", base_config(replicas=2, sampler={"walkers": 16, "steps": 300})
    )
    for r in range(2):
        work = res / "done" / ".resumable" / f"replica-{r}.zarr"
        ok = subprocess.run(
            [*_sample_cmd(done_cfg, work), "--replica", str(r)], capture_output=True, text=True
        )
        assert ok.returncode == 0, ok.stderr
        shutil.copytree(work, res / "done" / "draws" / f"replica-{r}.zarr", copy_function=os.link)
    # stale: killed by SIGKILL after a few commits
    stale_cfg = write_run(root / "cfg_stale", slow, model=SLOW_MODEL)
    stale = res / "stale" / ".resumable" / "replica-0.zarr"
    proc = subprocess.Popen(_sample_cmd(stale_cfg, stale), stderr=subprocess.DEVNULL)
    _wait(lambda: _steps(stale) >= 200, "the stale run's first commits")
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    # failed (log only): the model raises; the job's log holds chainyard's line
    bad_cfg = write_run(root / "cfg_bad", base_config(), model=BAD_MODEL)
    bad = subprocess.run(
        _sample_cmd(bad_cfg, res / "broken" / ".resumable" / "replica-0.zarr"),
        capture_output=True,
        text=True,
    )
    assert bad.returncode == 3
    (res / "logs" / "broken").mkdir(parents=True)
    (res / "logs" / "broken" / "sample-replica-0.log").write_text(bad.stdout + bad.stderr)
    # failed (note): the failure record a workflow job writes
    (res / "logs" / "noted").mkdir(parents=True)
    (res / "logs" / "noted" / "sample-replica-0.failure.json").write_text(
        json.dumps(
            {
                "run": "noted",
                "replica": 0,
                "exit_code": 2,
                "reason": "data.csv: row 3: not a number",
            }
        )
    )
    # sampling: still running while the tests look
    live_cfg = write_run(root / "cfg_live", slow, model=SLOW_MODEL)
    live = res / "live" / ".resumable" / "replica-0.zarr"
    runner = subprocess.Popen(_sample_cmd(live_cfg, live), stderr=subprocess.DEVNULL)
    _wait(lambda: _steps(live) >= 100, "the live run's first commit")
    try:
        yield res
    finally:
        runner.send_signal(signal.SIGKILL)
        runner.wait()


def test_states_and_reasons(results: Path) -> None:
    """Each run's state is told from committed data: done, stale lock, sampling, two failures."""
    by_run = {r["run"]: r for r in _status(results)}
    assert set(by_run) == {"done", "stale", "broken", "noted", "live"}
    assert by_run["done"]["state"] == "done"
    assert by_run["done"]["steps_done"] == by_run["done"]["steps_asked"] == 600
    assert by_run["done"]["eta_seconds"] == 0
    assert by_run["stale"]["state"] == "stale lock"
    assert "is gone (its process has ended) after committing step" in by_run["stale"]["reason"]
    assert by_run["stale"]["steps_done"] == _steps(
        results / "stale" / ".resumable" / "replica-0.zarr"
    )
    assert by_run["live"]["state"] == "sampling"
    assert by_run["broken"]["state"] == "failed"
    assert "the model divided by zero" in by_run["broken"]["reason"]
    assert by_run["noted"]["state"] == "failed"
    assert by_run["noted"]["reason"] == "replica 0: data.csv: row 3: not a number (exit 2)"


def test_json_keys_and_problems_first(results: Path) -> None:
    """Every object has the documented keys; failures and stale locks come first."""
    runs = _status(results)
    keys = {
        "run",
        "state",
        "steps_done",
        "steps_asked",
        "steps_per_second",
        "eta_seconds",
        "verdict",
    }
    for run in runs:
        assert keys <= set(run)
    order = ["failed", "stale lock", "sampling", "waiting", "done"]
    ranks = [order.index(r["state"]) for r in runs]
    assert ranks == sorted(ranks)


def test_sampling_speed_eta_and_interim_verdict(results: Path) -> None:
    """A sampling run gets a speed, an ETA that matches it, and a verdict once it has steps."""
    live = results / "live" / ".resumable" / "replica-0.zarr"
    first = _steps(live)
    _wait(lambda: _steps(live) > first + 100, "more commits of the live run")
    run = next(r for r in _status(results) if r["run"] == "live")
    assert run["state"] == "sampling"
    assert run["steps_per_second"] > 0
    left = run["steps_asked"] - run["steps_done"]
    assert run["eta_seconds"] == pytest.approx(left / run["steps_per_second"], rel=0.01)
    assert run["verdict"] is not None and run["verdict"]["to_step"] <= run["steps_done"]
    done = next(r for r in _status(results) if r["run"] == "done")
    assert done["verdict"]["replicas"] == 2
    assert done["verdict"]["from_step"] == 150 and done["verdict"]["to_step"] == 300


def test_text_table_and_no_lock_taken(results: Path) -> None:
    """The table names every run with reasons beneath; reading takes no lock (none is made)."""
    lock = results / "done" / ".resumable" / ".replica-0.zarr.lock"
    lock.unlink(missing_ok=True)
    res = cli("status", str(results))
    assert res.returncode == 0, res.stderr
    lines = res.stdout.splitlines()
    assert lines[0].startswith(f"{results}: 5 runs: 2 failed, 1 stale lock, 1 sampling, 1 done")
    assert [ln.split()[0] for ln in lines[2:] if not ln.startswith(" ")] == [
        "broken",
        "noted",
        "stale",
        "live",
        "done",
    ]
    assert "    replica 0: data.csv: row 3: not a number (exit 2)" in lines
    assert not lock.exists()


def test_html_page_is_self_contained(results: Path, tmp_path: Path) -> None:
    """The page has a row and two inline plots per run, reloads itself, loads nothing else."""
    page = tmp_path / "status.html"
    res = cli("status", str(results), "--html", str(page))
    assert res.returncode == 0, res.stderr
    text = page.read_text()
    assert text.count('<tr class="run"') == 5
    assert text.count("<svg") == 10
    assert '<meta http-equiv="refresh"' in text
    for outside in ("<script", "<link", "src=", "http://", "https://", "url("):
        assert outside not in text


def test_html_into_a_missing_folder_is_one_line(results: Path, tmp_path: Path) -> None:
    """--html naming a file in a folder that does not exist: one line, exit 2."""
    page = tmp_path / "nowhere" / "status.html"
    res = cli("status", str(results), "--html", str(page))
    assert res.returncode == 2
    assert res.stderr == (
        f"chainyard: error: {page}: --html: the folder {page.parent} does not exist\n"
    )


def test_missing_results_folder_is_one_line(tmp_path: Path) -> None:
    """A results folder that is not there: one line naming it, exit 2."""
    res = cli("status", str(tmp_path / "nowhere"))
    assert res.returncode == 2
    assert res.stderr == (
        f"chainyard: error: {tmp_path / 'nowhere'}: no such results folder (give the "
        "workflow's results/)\n"
    )


def test_done_run_shows_the_final_verdict(results: Path) -> None:
    """A done run whose diagnostics record is newer than its stores shows that verdict."""
    stores = [str(results / "done" / "draws" / f"replica-{r}.zarr") for r in range(2)]
    record = results / "done" / "diagnostics.json"
    made = cli("diagnose", *stores, "--raw", "--json", str(record))
    assert made.returncode == 0, made.stderr
    try:
        written = json.loads(record.read_text())
        verdict = next(r for r in _status(results) if r["run"] == "done")["verdict"]
        assert verdict["final"] is True
        assert verdict["ok"] is written["verdict"]["ok"]
        rhats = [p["rhat_nested"] for p in written["params"].values()]
        assert verdict["max_rhat"] == round(max(rhats), 4)
        assert verdict["to_step"] == written["steps"]
        table = cli("status", str(results)).stdout
        head = "ok (final)" if verdict["ok"] else "failed (final)"
        assert any(ln.startswith("done ") and head in ln for ln in table.splitlines())
    finally:
        record.unlink()
