"""`chainyard status` (text, JSON and the HTML page in headless chromium) on a workflow that is
running under real snakemake: one run sampling, one job SIGKILLed (a stale lock), one failed by
its model, one done, and while jobs wait their turn."""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import urllib.request
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import cli
from tests.patience import PATIENCE, patient
from tests.workflow.conftest import gauss_run, make_workflow, popen_snakemake

pytestmark = pytest.mark.slow

#: a model that sleeps (no CPU burnt on the shared machine): about 2 ms per step
SLEEPY_MODEL = """
import time
import numpy as np

def log_prob(theta, data):
    time.sleep(0.002)
    return -0.5 * np.sum(theta * theta, axis=1)
"""

BROKEN_MODEL = """
def log_prob(theta, data):
    raise ValueError("the model is broken on purpose")
"""

CHROMIUM_FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
)  # fmt: skip


def _wait(condition: Callable[[], Any], what: str, limit: float = PATIENCE) -> Any:
    """Wait for ``condition()`` to be truthy (the limit only turns a hang into a failure)."""
    end = time.monotonic() + limit
    while True:
        value = condition()
        if value:
            return value
        if time.monotonic() > end:
            raise AssertionError(f"gave up waiting for {what}")
        time.sleep(0.2)


def _steps(store: Path) -> int:
    try:
        return int(json.loads((store / "commit.json").read_text())["steps_done"])
    except (OSError, ValueError, KeyError):
        return 0


def _status(folder: Path) -> dict[str, dict[str, Any]]:
    res = cli("status", "results", "--json", "--config", "config/config.yaml", cwd=folder)
    assert res.returncode == 0, res.stderr
    return {r["run"]: r for r in json.loads(res.stdout)}


def _chromium() -> str:
    found = shutil.which("chromium") or shutil.which("chromium-browser")
    if found is None:
        pytest.skip("chromium is not installed (apt-get install -y chromium; .ci/run does it)")
    return found


@pytest.fixture
def workflow(tmp_path: Path) -> Iterator[tuple[Path, subprocess.Popen[str]]]:
    """A workflow of four runs started under snakemake (2 cores, no retries, keep going)."""
    sleepy = {"log_prob": "models/sleepy.py:log_prob", "vectorized": True}
    storage = {"fsync": False, "commit_every_seconds": 0.3}
    runs = {
        "long": gauss_run(steps=400_000, replicas=1, storage=storage, model=sleepy),
        "victim": gauss_run(steps=400_000, replicas=1, storage=storage, model=sleepy),
        "quick": gauss_run(steps=400, replicas=1),
        "broken": gauss_run(
            steps=400,
            replicas=1,
            model={"log_prob": "models/broken.py:log_prob", "vectorized": True},
        ),
    }
    models = {
        "gauss.py": "import numpy as np\n\ndef log_prob(theta, data):\n"
        "    return -0.5 * np.sum(theta * theta, axis=1)\n",
        "sleepy.py": SLEEPY_MODEL,
        "broken.py": BROKEN_MODEL,
    }
    folder = make_workflow(tmp_path / "wf", runs, models=models, sample_retries=0)
    proc = popen_snakemake(folder, "--cores", "2", "--keep-going")
    try:
        yield folder, proc
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()


def test_status_of_a_running_workflow(workflow: tuple[Path, subprocess.Popen[str]]) -> None:
    """Every run is listed with the state its files show, while snakemake runs the jobs."""
    folder, proc = workflow
    res = folder / "results"
    first = _status(folder)  # before or as jobs start: every configured run is listed
    assert set(first) == {"long", "victim", "quick", "broken"}
    for run in first.values():
        assert run["state"] in ("waiting", "sampling", "done", "failed")
        assert run["steps_asked"] in (400_000, 400)
    victim = res / "victim" / ".resumable" / "replica-0.zarr"
    _wait(lambda: _steps(victim) >= 300, "the victim's first commits")
    marker = victim.parent / ".replica-0.zarr.running"
    os.kill(int(json.loads(marker.read_text())["pid"]), signal.SIGKILL)
    long = res / "long" / ".resumable" / "replica-0.zarr"
    _wait(
        lambda: (
            (res / "quick" / "draws" / "replica-0.zarr").exists()
            and (res / "logs" / "broken" / "sample-replica-0.log").exists()
            and _steps(long) >= 300
        ),
        "quick done, broken failed and long sampling",
    )
    now = _wait(
        lambda: (s := _status(folder))["broken"]["state"] == "failed" and s, "broken's failure"
    )
    assert proc.poll() is None  # the workflow is still running (long samples on)
    assert now["long"]["state"] == "sampling"
    assert now["long"]["steps_per_second"] > 0 and now["long"]["eta_seconds"] > 0
    assert now["victim"]["state"] == "stale lock"
    assert "is gone (its process has ended) after committing step" in now["victim"]["reason"]
    assert now["quick"]["state"] == "done"
    assert now["quick"]["steps_done"] == now["quick"]["steps_asked"] == 400
    assert now["quick"]["verdict"] is not None
    assert "the model is broken on purpose" in now["broken"]["reason"]
    assert [r["state"] for r in sorted(now.values(), key=lambda r: r["run"])] == [
        "failed", "sampling", "done", "stale lock"
    ]  # fmt: skip
    text = cli("status", "results", cwd=folder)
    assert text.returncode == 0, text.stderr
    order = [ln.split()[0] for ln in text.stdout.splitlines()[2:] if not ln.startswith(" ")]
    assert order == ["broken", "victim", "long", "quick"]  # problems first


def _title(port: int) -> str:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=patient(30)) as r:
        pages = [p for p in json.load(r) if p.get("type") == "page"]
    return str(pages[0]["title"]) if pages else ""


def _committed(title: str) -> int:
    m = re.search(r"status: ([\d,]+) steps committed", title)
    return int(m.group(1).replace(",", "")) if m else -1


def test_html_page_in_headless_chromium(workflow: tuple[Path, subprocess.Popen[str]]) -> None:
    """The page loads in chromium, shows every run, and reloads with new commits."""
    browser = _chromium()
    folder, _ = workflow
    res = folder / "results"
    long = res / "long" / ".resumable" / "replica-0.zarr"
    _wait(lambda: _steps(long) >= 100, "long's first commits")
    page = folder / "status.html"
    watcher = subprocess.Popen(
        [sys.executable, "-m", "chainyard.cli", "status", "results", "--config",
         "config/config.yaml", "--watch", "1", "--html", str(page)],
        cwd=folder, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip
    profile = Path(tempfile.mkdtemp(prefix="chromium-"))
    live = None
    try:
        _wait(page.exists, "the first page")
        dump = subprocess.run(
            [browser, *CHROMIUM_FLAGS, f"--user-data-dir={profile / 'dump'}", "--dump-dom",
             page.as_uri()],
            capture_output=True, text=True, timeout=PATIENCE,
        )  # fmt: skip
        assert dump.returncode == 0, dump.stderr[-2000:]
        shown = set(re.findall(r'<tr class="run" data-run="([^"]+)"', dump.stdout))
        assert shown == {"long", "victim", "quick", "broken"}
        assert dump.stdout.count("<svg") == 8
        live = subprocess.Popen(
            [browser, *CHROMIUM_FLAGS, f"--user-data-dir={profile / 'live'}",
             "--remote-debugging-port=0", page.as_uri()],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True,
        )  # fmt: skip
        port_file = profile / "live" / "DevToolsActivePort"
        _wait(lambda: port_file.exists() and port_file.read_text().strip(), "chromium's port")
        port = int(port_file.read_text().split()[0])
        seen = _wait(lambda: _committed(_title(port)) > 0 and _committed(_title(port)), "a title")
        on_disk = _steps(long)
        _wait(lambda: _steps(long) > on_disk, "a new commit of long")
        later = _wait(
            lambda: _committed(_title(port)) > seen and _committed(_title(port)),
            "the page in the browser to reload with the new commit",
        )
        assert later > seen
    finally:
        if live is not None:
            os.killpg(live.pid, signal.SIGKILL)
            live.wait()
        watcher.send_signal(signal.SIGINT)
        watcher.wait(timeout=PATIENCE)
        shutil.rmtree(profile, ignore_errors=True)
    assert watcher.returncode == 0, watcher.stderr.read() if watcher.stderr else ""
