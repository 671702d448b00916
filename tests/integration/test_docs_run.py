"""Every example of README.md and docs/*.md runs as written, or names where it is run.

An example is a fenced block in a shell fence (none, ``sh``, ``bash``, ``shell``,
``console``) or in ``python``. Each is either

* run here, in a folder laid out like a clone after the README's walkthrough (the walkthrough
  itself is run first, as written: ``runs/kiln.yaml`` and its commands);
* run by its own test here (the Dask and object-storage "one machine" blocks, whose
  background servers need their ports to open before the next line);
* or listed in ``ELSEWHERE`` with the test that runs it or the reason it cannot run on a test
  machine (a cluster address, credentials, ``pip install``), or in ``OUTPUT`` (an example of
  what a command prints).

A new example that is in none of these fails ``test_every_example_is_accounted_for``, so the
documentation cannot grow examples that no test runs. Shell lines run with ``bash`` in the
folder, this environment's ``chainyard`` first on PATH; ``[...]`` parts (optional, as in a
usage line) are left out; a python block runs with this interpreter. Running documented
examples is common practice, no source.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

import chainyard
from tests.patience import PATIENCE

pytestmark = pytest.mark.slow

ROOT = Path(__file__).resolve().parents[2]
PAGES = [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md"))]
SHELL = {"", "sh", "bash", "shell", "console"}
WALKTHROUGH = "## One run from the command line"


@dataclass(frozen=True)
class Example:
    """One fenced block: page, line of its fence, language and text."""

    page: str
    line: int
    lang: str
    text: str

    @property
    def key(self) -> tuple[str, str]:
        """(page, the first 40 characters of its first line, spaces collapsed): stable under
        edits elsewhere on the page."""
        return self.page, " ".join(self.text.strip().splitlines()[0].split())[:40]


def examples(page: Path) -> list[Example]:
    """The page's shell and python blocks, in order."""
    found = []
    for match in re.finditer(r"^```(\w*)\n(.*?)^```", page.read_text(), flags=re.S | re.M):
        lang = match.group(1).lower()
        if lang in SHELL or lang == "python":
            line = page.read_text()[: match.start()].count("\n") + 1
            found.append(Example(page.name, line, lang, match.group(2)))
    return found


def commands(text: str) -> list[str]:
    """A shell block's commands: continuations joined, `` # comments``, ``[...]`` parts and a
    leading ``$ `` dropped, empty lines left out."""
    out = []
    for raw in text.replace("\\\n", " ").splitlines():
        line = re.split(r"\s+#\s", raw, maxsplit=1)[0].strip()
        line = re.sub(r"\s*\[[^\]]*\]", "", line).removeprefix("$ ").strip()
        if line:
            out.append(" ".join(line.split()))
    return out


ALL = [ex for page in PAGES for ex in examples(page)]

#: run here, after the walkthrough (shell blocks first, then python blocks, each in page order)
RUN_HERE = {
    ("provenance.md", "chainyard inspect results/kiln/draws/rep"),
    ("python-api.md", "import chainyard"),
    ("results-table-and-plots.md", "chainyard export results/kiln/draws/repl"),
    ("results-table-and-plots.md", "chainyard results-table results/kiln/dra"),
    ("workers.md", "chainyard sample runs/kiln.yaml --out re"),
}

DASK_BLOCK = ("dask.md", "dask scheduler --host 127.0.0.1 --port 8")
S3_BLOCK = ("object-storage.md", "moto_server -p 5000 &")
#: run by a test of their own below
OWN_TEST = {
    ("README.md", "import chainyard.workflow"),
    ("workflow.md", "import chainyard.workflow"),
    DASK_BLOCK,
    S3_BLOCK,
}

#: run elsewhere, or not runnable on a test machine: (page, first line, why)
ELSEWHERE_WHY = [
    ("README.md", "make demo # creates .venv, installs chai",
     "`.ci/run` runs `make test`; tests/workflow/test_example_workflow.py runs the demo"),
    ("README.md", ". .venv/bin/activate # after `make demo`",
     "the walkthrough, run by the `sandbox` fixture here"),
    ("README.md", "chainyard decide burn-in results/kiln/dr",
     "the walkthrough, run by the `sandbox` fixture here"),
    ("dask.md", "pip install 'chainyard[dask]' # the `dis",
     "a cluster address of the reader's; the one-machine block runs the same command"),
    ("dask.md", "# dask_cluster.py: a Dask cluster of 8 S",
     "tests/cluster/test_slurm_workflow.py::test_dask_jobqueue_example_on_slurm"),
    ("dask.md", "chainyard sample runs/model.yaml --out r",
     "the address the script above prints; the one-machine block runs the same command"),
    ("object-storage.md", "pip install 'chainyard[s3]' # s3fs",
     "credentials and a bucket of the reader's; tests/integration/test_object_storage.py"),
    ("slurm.md", 'pip install "chainyard[slurm]" # chainya',
     "a SLURM cluster; tests/cluster/test_slurm_workflow.py runs the shipped profile"),
]  # fmt: skip
ELSEWHERE = {(page, first): why for page, first, why in ELSEWHERE_WHY}

#: examples of what a command prints or a file holds
OUTPUT = {
    ("many-objects.md", "name,data_file,t0_guess"),
    ("workflow.md", "chainyard: error: config: runs.cooling: "),
    ("integrity.md", "chainyard: error: runs/kiln/r0.zarr: dra"),
    ("integrity.md", "chainyard: error: runs/kiln/r0.zarr: com"),
    ("provenance.md", "PROBLEM draws/position chunk 3 (steps 30"),
    ("status.md", "$ chainyard status results --config conf"),
}


def by_key(key: tuple[str, str]) -> Example:
    return next(ex for ex in ALL if ex.key == key)


def test_every_example_is_accounted_for() -> None:
    """Every example is run here, by its own test, elsewhere (named) or is output; and every
    listed key still names an example."""
    listed = RUN_HERE | OWN_TEST | set(ELSEWHERE) | OUTPUT
    keys = {ex.key for ex in ALL}
    unaccounted = [f"{ex.page}:{ex.line}: {ex.key[1]}" for ex in ALL if ex.key not in listed]
    stale = sorted(f"{page}: {first}" for page, first in listed - keys)
    assert not unaccounted, "examples no test runs (add to a list above): " + "; ".join(unaccounted)
    assert not stale, "listed examples that are gone: " + "; ".join(stale)
    assert len(HERE) >= 6 and len(OWN_TEST) == 4


def env() -> dict[str, str]:
    return {**os.environ, "PATH": f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}"}


def run_shell(command: str, cwd: Path) -> None:
    res = subprocess.run(
        ["bash", "-c", command],
        cwd=cwd,
        capture_output=True,
        text=True,
        env=env(),
        timeout=PATIENCE,
    )
    assert res.returncode == 0, f"{command}\n{res.stdout[-2000:]}\n{res.stderr[-2000:]}"


def walkthrough() -> tuple[str, str, list[str]]:
    """The README walkthrough's config path, config text and commands, in README order."""
    body = (ROOT / "README.md").read_text().split(WALKTHROUGH, 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```(\w*)\n(.*?)```", body, flags=re.S)
    yaml_text = next(text for lang, text in blocks if lang == "yaml")
    path = yaml_text.splitlines()[0].lstrip("# ").strip()
    return path, yaml_text, [c for lang, text in blocks if not lang for c in commands(text)]


def test_walkthrough_extraction_finds_the_steps() -> None:
    """The extraction sees the config and the commands a user types (check, sample, decide,
    diagnose, derive), so the run below cannot pass on an empty list."""
    path, text, cmds = walkthrough()
    assert path == "runs/kiln.yaml" and "log_prob:" in text
    assert [c.split()[1] for c in cmds if c.startswith("chainyard ")] == [
        "check",
        "sample",
        "decide",
        "diagnose",
        "derive",
    ]
    assert cmds[0] == ". .venv/bin/activate"


@pytest.fixture(scope="module")
def sandbox(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A clone-like folder after the README walkthrough, run as written, plus the two records
    the docs pages also read (the workflow's ``diagnostics.json`` and a thinning record),
    made with chainyard's own commands."""
    root = tmp_path_factory.mktemp("docs")
    path, text, cmds = walkthrough()
    for sub in ("models", "data"):
        shutil.copytree(ROOT / "example_workflow" / sub, root / "example_workflow" / sub)
    (root / path).parent.mkdir(parents=True, exist_ok=True)
    (root / path).write_text(text)
    for command in cmds:
        if command != ". .venv/bin/activate":  # this environment is on PATH
            run_shell(command, root)
    kiln = "results/kiln/draws/replica-*.zarr --burn-in-record results/kiln/decisions/burn_in.json"
    run_shell(f"chainyard diagnose {kiln} --json results/kiln/diagnostics.json", root)
    run_shell(f"chainyard decide thinning {kiln} --out results/kiln/decisions/thinning.json", root)
    return root


def test_walkthrough_runs_as_written(sandbox: Path) -> None:
    """Every walkthrough command exited 0 (in the fixture); the stores, the burn-in record
    and the derived store are where the README says."""
    kiln = sandbox / "results" / "kiln"
    for r in (0, 1):
        assert chainyard.open_store(kiln / "draws" / f"replica-{r}.zarr").steps_done == 4000
    assert (kiln / "decisions" / "burn_in.json").is_file()
    derived = chainyard.open_store(kiln / "standalone" / "replica-0.zarr")
    assert derived.attrs["derived"]["burn_in_decided"] is True


HERE = sorted(
    (ex for ex in ALL if ex.key in RUN_HERE), key=lambda ex: (ex.lang == "python", ex.page, ex.line)
)


@pytest.mark.parametrize("ex", HERE, ids=lambda ex: f"{ex.page}:{ex.line}")
def test_example_runs_here(ex: Example, sandbox: Path) -> None:
    """The example runs as written after the walkthrough: every command exits 0, a python
    block runs to its end (python-api.md's second block writes ``kiln.nc``)."""
    if ex.lang == "python":
        res = subprocess.run(
            [sys.executable, "-c", ex.text],
            cwd=sandbox,
            capture_output=True,
            text=True,
            env=env(),
            timeout=PATIENCE,
        )
        assert res.returncode == 0, f"{ex.page}:{ex.line}\n{res.stderr[-3000:]}"
    else:
        for command in commands(ex.text):
            run_shell(command, sandbox)
    if "to_netcdf" in ex.text:
        assert (sandbox / "kiln.nc").stat().st_size > 0


def script(ex: Example) -> str:
    """A shell block as one bash script: stop at the first failure, wait after each
    background line for the port it names to open (or, for Dask workers, for them to join
    their scheduler, which on a loaded machine can take longer than a run waits), stop the
    background jobs at the end."""
    lines = ["set -e", "trap 'kill $(jobs -p) 2>/dev/null; wait' EXIT"]
    for command in commands(ex.text):
        lines.append(command)
        port = re.search(r"(?:--port|-p)\s+(\d+)", command)
        worker = re.match(r"dask worker (tcp://\S+) --nworkers (\d+)", command)
        if command.endswith("&") and port:
            lines.append(
                f"for i in $(seq 600); do (echo > /dev/tcp/127.0.0.1/{port.group(1)}) "
                "2>/dev/null && break; sleep 0.5; done"
            )
        elif command.endswith("&") and worker:
            address, count = worker.groups()
            lines.append(
                f"python -c \"from distributed import Client; Client('{address}', "
                f"timeout={PATIENCE:.0f}).wait_for_workers({count}, timeout={PATIENCE:.0f})\""
            )
    return "\n".join(lines) + "\n"


def run_script(ex: Example, cwd: Path) -> subprocess.CompletedProcess[str]:
    res = subprocess.run(
        ["bash", "-c", script(ex)],
        cwd=cwd,
        capture_output=True,
        text=True,
        env=env(),
        timeout=PATIENCE,
        start_new_session=True,
    )
    assert res.returncode == 0, f"{ex.page}:{ex.line}\n{res.stdout[-3000:]}\n{res.stderr[-3000:]}"
    return res


def test_dask_on_one_machine(sandbox: Path) -> None:
    """docs/dask.md's one-machine block: a scheduler and two workers, then a 400-step run;
    its rows are bitwise the first 400 of the walkthrough's serial replica 0 (same config and
    replica; a longer run extends a shorter one exactly)."""
    pytest.importorskip("distributed")
    res = run_script(by_key(DASK_BLOCK), sandbox)
    assert "Dask cluster at tcp://127.0.0.1:8786" in res.stdout + res.stderr
    dask = chainyard.open_store(sandbox / "kiln-dask.zarr")
    serial = chainyard.open_store(sandbox / "results/kiln/draws/replica-0.zarr")
    assert dask.steps_done == 400
    assert np.array_equal(dask.draws(), serial.draws(stop=400))
    assert np.array_equal(dask.log_prob(), serial.log_prob()[:400])
    assert np.array_equal(dask.accepted(), serial.accepted()[:400])


def test_object_storage_on_one_machine(sandbox: Path) -> None:
    """docs/object-storage.md's one-machine block: moto's server, a bucket, publish, inspect
    and verify from the bucket."""
    pytest.importorskip("moto")
    res = run_script(by_key(S3_BLOCK), sandbox)
    assert "read back and verified there" in res.stdout + res.stderr


@pytest.mark.parametrize("page", ["README.md", "workflow.md"])
def test_snakefile_lines_plan_the_run(page: str, sandbox: Path, tmp_path: Path) -> None:
    """The Snakefile lines (README's and docs/workflow.md's) with docs/workflow.md's workflow
    config and the walkthrough's run config plan every step of the run (a dry run)."""
    snakefile = by_key((page, "import chainyard.workflow")).text
    yaml_block = re.search(
        r"```yaml\n(chainyard:.*?)```", (ROOT / "docs" / "workflow.md").read_text(), flags=re.S
    )
    assert yaml_block is not None
    (tmp_path / "Snakefile").write_text(snakefile)
    (tmp_path / "config" / "runs").mkdir(parents=True)
    (tmp_path / "config" / "config.yaml").write_text(yaml_block.group(1))
    # the run config's paths are relative to it: ../example_workflow from config/runs/
    shutil.copy(sandbox / "runs" / "kiln.yaml", tmp_path / "config" / "runs" / "kiln.yaml")
    shutil.copytree(sandbox / "example_workflow", tmp_path / "config" / "example_workflow")
    res = subprocess.run(
        ["snakemake", "-n", "--cores", "1"],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        env=env(),
        timeout=PATIENCE,
    )
    assert res.returncode == 0, res.stdout[-2000:] + res.stderr[-2000:]
    jobs = dict(re.findall(r"^(chainyard_\w+)\s+(\d+)$", res.stdout, flags=re.M))
    assert jobs.get("chainyard_sample") == "2" and "chainyard_analyse" in jobs, res.stdout
