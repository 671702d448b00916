"""Bad input for the samplers beyond the ensemble: one line, the documented exit code, no
traceback, nothing stored (exit codes: README table and chainyard.errors)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from tests.conftest import GAUSS_MODEL, cli, write_run

PARAMS = [
    {"name": "x", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
    {"name": "y", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
]


def _run(tmp_path: Path, sampler: dict[str, Any], files: dict[str, str] | None = None) -> Any:
    cfg = write_run(
        tmp_path,
        {
            "model": {"log_prob": "model.py:log_prob"},
            "parameters": PARAMS,
            "sampler": sampler,
            "seed": 1,
        },
        GAUSS_MODEL,
        files=files,
    )
    return cli("sample", str(cfg), "--out", str(tmp_path / "s.zarr"), "--progress", "off")


def _one_line(res: Any, code: int) -> str:
    assert res.returncode == code, res.stderr
    lines = [ln for ln in res.stderr.splitlines() if "error" in ln]
    assert len(lines) == 1 and "Traceback" not in res.stderr, res.stderr
    return lines[0]


def test_key_of_another_kind_is_named(tmp_path: Path) -> None:
    """``walkers`` under metropolis_hastings: one line naming the key and the kind's keys."""
    res = _run(
        tmp_path,
        {"kind": "metropolis_hastings", "walkers": 8, "steps": 10, "proposal_sd": 1.0},
    )
    line = _one_line(res, 2)
    assert "sampler.walkers: not a setting of kind metropolis_hastings (it has chains, steps" in (
        line
    )
    assert not (tmp_path / "s.zarr").exists()


def test_kernel_with_outside_randomness_is_caught(tmp_path: Path) -> None:
    """A kernel drawing from numpy's global generator fails the first-commit replay check."""
    kernel = (
        "import numpy as np\n\n"
        "def step(state, rng, data):\n"
        "    return state + np.random.normal(size=state.shape)\n"
    )
    res = _run(
        tmp_path,
        {"kind": "kernel", "kernel": "k.py:step", "chains": 2, "steps": 50},
        files={"k.py": kernel},
    )
    line = _one_line(res, 3)
    assert "sampler.kernel k.py:step is not reproducible" in line
    assert "rng argument" in line
    assert not (tmp_path / "s.zarr").exists()


def test_kernel_exception_is_one_model_line(tmp_path: Path) -> None:
    """A kernel that raises: one model error naming the kernel, step and chain."""
    kernel = "def step(state, rng, data):\n    raise ZeroDivisionError('no way')\n"
    res = _run(
        tmp_path,
        {"kind": "kernel", "kernel": "k.py:step", "chains": 2, "steps": 50},
        files={"k.py": kernel},
    )
    line = _one_line(res, 3)
    assert "sampler.kernel k.py:step raised ZeroDivisionError: no way at step 0, chain 0" in line


def test_invalid_envelope_names_x(tmp_path: Path) -> None:
    """log f > log M + log g somewhere: a config error naming x; nothing stored."""
    res = _run(
        tmp_path,
        {
            "kind": "accept_reject",
            "envelope": [{"normal": {"loc": 0.0, "scale": 0.5}}] * 2,
            "log_bound": 0.0,
            "draws": 100,
        },
    )
    line = _one_line(res, 2)
    assert "sampler.envelope: invalid at x = (x=" in line and "exceeds log_bound" in line
    assert not (tmp_path / "s.zarr").exists()


def test_kernel_non_finite_state_is_one_model_line(tmp_path: Path) -> None:
    """A kernel returning NaN: one model error naming the kernel, step and chain."""
    kernel = (
        "import numpy as np\n\n"
        "def step(state, rng, data):\n"
        "    return (np.full(2, np.nan), 0.0) if rng.random() < 2 else state\n"
    )
    res = _run(
        tmp_path,
        {"kind": "kernel", "kernel": "k.py:step", "chains": 2, "steps": 50},
        files={"k.py": kernel},
    )
    line = _one_line(res, 3)
    assert "sampler.kernel k.py:step returned" in line and "at step 0, chain 0" in line
    assert "finite numbers" in line


def test_check_loads_the_kernel(tmp_path: Path) -> None:
    """``chainyard check`` imports the kernel as ``sample`` would: a good one is named in the
    one-line report; a missing function is one line, exit 2, nothing written."""
    kernel = "def sweep(state, rng, data):\n    return state + rng.normal(size=state.shape)\n"
    sampler = {"kind": "kernel", "kernel": "gibbs.py:sweep", "chains": 4, "steps": 10}
    cfg = write_run(
        tmp_path,
        {"model": {"log_prob": "model.py:log_prob"}, "parameters": PARAMS, "sampler": sampler,
         "seed": 1},
        GAUSS_MODEL,
        files={"gibbs.py": kernel},
    )
    res = cli("check", str(cfg))
    assert res.returncode == 0, res.stderr
    assert "4 chains" in res.stdout and "kernel gibbs.py:sweep loaded" in res.stdout, res.stdout
    (tmp_path / "gibbs.py").write_text(kernel.replace("def sweep", "def other"))
    line = _one_line(cli("check", str(cfg)), 2)
    assert "sampler.kernel" in line and "sweep" in line, line
    assert sorted(p.name for p in tmp_path.iterdir() if p.suffix == ".zarr") == []
