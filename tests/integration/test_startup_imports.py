"""What `chainyard --help`, `inspect` and `sample` import: only what each command uses.

Each command runs in a fresh interpreter through a small probe that records ``sys.modules``
at exit (after the command has run to its end), so the check sees every import, however deep.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import write_run
from tests.patience import PATIENCE

_PROBE = (
    "import atexit, json, sys\n"
    "out = sys.argv[1]\n"
    "atexit.register(lambda: open(out, 'w').write(json.dumps(sorted(sys.modules))))\n"
    "from chainyard.cli import main\n"
    "sys.argv = ['chainyard', *sys.argv[2:]]\n"
    "sys.exit(main())\n"
)

#: never imported by these commands (heavy, and none of them needs them)
FORBIDDEN = ("scipy", "matplotlib", "xarray", "snakemake", "arviz_base")
#: chainyard subpackages that only analysis commands need
FORBIDDEN_CHAINYARD = ("chainyard.diagnostics", "chainyard.decisions", "chainyard.report")
#: the analysis package's lazy top level and its parser declarations are all that may load
ALLOWED_ANALYSIS = {
    "chainyard.analysis",
    "chainyard.analysis.selection_options",  # option declarations only (no numpy)
}


def _modules(tmp_path: Path, *args: str) -> set[str]:
    """Modules loaded by ``chainyard ARGS`` run to its end (its exit status must be 0)."""
    out = tmp_path / "modules.json"
    res = subprocess.run(
        [sys.executable, "-c", _PROBE, str(out), *args],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        timeout=PATIENCE,
    )
    assert res.returncode == 0, res.stderr
    return set(json.loads(out.read_text()))


def _unwanted(modules: set[str], also: tuple[str, ...] = ()) -> list[str]:
    """Loaded modules that the command should not have imported."""
    tops = FORBIDDEN + also
    bad = [m for m in modules if m.split(".")[0] in tops]
    bad += [m for m in modules if m.startswith(FORBIDDEN_CHAINYARD)]
    bad += [m for m in modules if m.startswith("chainyard.analysis") and m not in ALLOWED_ANALYSIS]
    return sorted(bad)


@pytest.fixture(scope="module")
def store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small sampled store (20 steps) and its run folder."""
    folder = tmp_path_factory.mktemp("startup")
    cfg = write_run(folder)
    cfg.write_text(cfg.read_text().replace("steps: 2000", "steps: 20"))
    res = subprocess.run(
        [sys.executable, "-m", "chainyard.cli", "sample", "run.yaml", "--out", "s.zarr"],
        cwd=folder,
        capture_output=True,
        text=True,
        timeout=PATIENCE,
    )
    assert res.returncode == 0, res.stderr
    return folder / "s.zarr"


def test_help_imports_no_numpy_zarr_pydantic_or_analysis(tmp_path: Path) -> None:
    """`chainyard --help` lists every command without importing numpy, zarr or pydantic."""
    modules = _modules(tmp_path, "--help")
    assert _unwanted(modules, ("numpy", "zarr", "pydantic", "emcee", "yaml")) == []


def test_help_still_lists_every_command(tmp_path: Path) -> None:
    """The lazily imported command modules still register all their commands."""
    res = subprocess.run(
        [sys.executable, "-m", "chainyard.cli", "--help"],
        capture_output=True,
        text=True,
        timeout=PATIENCE,
    )
    assert res.returncode == 0
    commands = ("sample", "diagnose", "export", "results-table", "status", "plot", "inspect")
    for command in (*commands, "verify"):
        assert command in res.stdout


def test_inspect_imports_no_scipy_or_analysis(store: Path) -> None:
    """`chainyard inspect STORE` reads the store without scipy or the analysis code (emcee,
    without its KDE move's scipy.stats, may load: the seal check asks the sampler kind's
    declaration what the store must hold)."""
    modules = _modules(store.parent, "inspect", store.name)
    assert "zarr" in modules  # it did read the store
    assert _unwanted(modules) == []


def test_sample_imports_no_scipy_or_analysis(store: Path) -> None:
    """A sampling run starts without scipy (emcee's KDE import blocked) or the analysis code."""
    modules = _modules(
        store.parent, "sample", "run.yaml", "--out", "fresh.zarr", "--progress", "off"
    )
    assert "emcee" in modules  # it did sample with emcee's moves
    assert (store.parent / "fresh.zarr" / "commit.json").is_file()
    assert _unwanted(modules) == []


def test_diagnose_imports_no_scipy_stats(store: Path) -> None:
    """`chainyard diagnose` (and the workflow's analysis job, which runs the same code) loads
    scipy's special functions, not scipy.stats: about 1 s of import per job for two
    quantile functions (computed bit for bit as scipy.stats does, checked in the diagnostics
    unit tests against scipy.stats itself)."""
    modules = _modules(store.parent, "diagnose", store.name, "--raw")
    assert "chainyard.diagnostics.mcse" in modules and "scipy.special" in modules
    assert not [m for m in modules if m.startswith("scipy.stats")], "scipy.stats was imported"


def test_replica_field_matches_until_targets() -> None:
    """The command line's `{replica}` field is the one `--until-targets` expands."""
    import inspect

    from chainyard.analysis.until import REPLICA_FIELD
    from chainyard.commands import sample

    assert f'REPLICA_FIELD = "{REPLICA_FIELD}"' in inspect.getsource(sample._cmd_sample)
