"""One conformance suite that every sampler kind passes (the ensemble included).

For each kind, with real ``chainyard sample`` subprocesses: the same seed twice gives the same
bytes; a run killed with SIGKILL and resumed equals an uninterrupted run bitwise; a shorter
run extended equals a direct run bitwise; the store has the same groups and arrays as every
other kind's (plus the engine's own blobs) and passes ``chainyard verify`` with a replay of
its first steps. Exactness is compared bitwise against the project's own uninterrupted run
(the property itself is the reference: resume must not change a draw).
"""

from __future__ import annotations

import signal
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import chainyard
from tests.conftest import SLOW_MODEL, assert_same_store, cli, held_env, popen_cli, write_run
from tests.patience import PATIENCE

STEPS = 1200
STORAGE = {"chunk_steps": 64, "commit_every_steps": 50, "commit_every_seconds": 0.05}
PARAMETERS = [
    {"name": "x", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
    {"name": "y", "init": {"uniform": {"low": -1.0, "high": 1.0}}},
]
#: an exact kernel for N(0, I): the autoregressive update x' = a x + sqrt(1 - a^2) z
KERNEL = """
import numpy as np

def step(state, rng, data):
    return 0.5 * state + np.sqrt(0.75) * rng.standard_normal(state.shape)
"""

SAMPLERS: dict[str, dict[str, Any]] = {
    "ensemble": {"walkers": 8, "steps": STEPS},
    "metropolis_hastings": {
        "kind": "metropolis_hastings",
        "chains": 4,
        "steps": STEPS,
        "proposal_sd": [1.0, 1.5],
        "adapt_steps": 300,
    },
    "kernel": {"kind": "kernel", "kernel": "kernel.py:step", "chains": 4, "steps": STEPS},
    # log f = -|x|^2 / 2 under g = N(0, 2^2) per parameter: log f - log g <= 2 (log 2 +
    # log(2 pi) / 2) = 3.2242 (analytic), so log M = 3.3 is a valid bound
    "accept_reject": {
        "kind": "accept_reject",
        "envelope": [{"normal": {"loc": 0.0, "scale": 2.0}}] * 2,
        "log_bound": 3.3,
        "draws": STEPS,
        "chains": 4,
    },
}
KINDS = list(SAMPLERS)
#: model calls in about the first 400 steps of each kind (counted: 9,664 / 4,833 / 4,808 /
#: 23,579 calls in a whole 1,200-step run)
HOLD_AFTER_CALLS = {
    "ensemble": 3200,
    "metropolis_hastings": 1600,
    "kernel": 1600,
    "accept_reject": 7800,
}


def _config(kind: str, steps: int = STEPS) -> dict[str, Any]:
    sampler = dict(SAMPLERS[kind])
    sampler["draws" if kind == "accept_reject" else "steps"] = steps
    return {
        "model": {"log_prob": "model.py:log_prob"},
        "parameters": PARAMETERS,
        "sampler": sampler,
        "storage": STORAGE,
        "seed": 5,
    }


def _write(folder: Path, kind: str, steps: int = STEPS) -> Path:
    return write_run(folder, _config(kind, steps), SLOW_MODEL, files={"kernel.py": KERNEL})


def _sample(cfg: Path, out: Path, *extra: str) -> str:
    res = cli("sample", str(cfg), "--out", str(out), "--progress", "off", *extra)
    assert res.returncode == 0, res.stderr
    return res.stderr


@pytest.fixture(scope="module")
def references(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """An uninterrupted run of every kind, each made by its own process."""
    out = {}
    for kind in KINDS:
        folder = tmp_path_factory.mktemp(kind)
        _sample(_write(folder, kind), folder / "ref.zarr")
        out[kind] = folder / "ref.zarr"
    return out


@pytest.mark.parametrize("kind", KINDS)
def test_same_seed_same_bytes(kind: str, tmp_path: Path, references: dict[str, Path]) -> None:
    """A second process with the same config gives the same draws, log-prob, acceptance,
    blobs, random state and chunk checksums."""
    _sample(_write(tmp_path, kind), tmp_path / "again.zarr")
    assert_same_store(tmp_path / "again.zarr", references[kind])
    store = chainyard.open_store(references[kind])
    assert store.draws().shape[:2] == (STEPS, 8 if kind == "ensemble" else 4)
    assert np.isfinite(store.log_prob()).all()


@pytest.mark.parametrize("kind", KINDS)
def test_sigkill_then_resume_is_exact(
    kind: str, tmp_path: Path, references: dict[str, Path]
) -> None:
    """SIGKILL of a real ``chainyard sample`` after some commits, then a rerun: identical."""
    cfg = _write(tmp_path, kind)
    out = tmp_path / "killed.zarr"
    # after about 400 of its 1,200 steps the run crawls, 50 ms per model call, so it cannot
    # end before this test, however starved, has seen 100 steps committed
    env = held_env(tmp_path / "hold", after_calls=HOLD_AFTER_CALLS[kind], pause=0.05)
    proc = popen_cli("sample", str(cfg), "--out", str(out), "--progress", "off", env=env)
    start = time.monotonic()
    while time.monotonic() - start < PATIENCE and proc.poll() is None:
        try:
            if chainyard.open_store(out).steps_done >= 100:
                break
        except chainyard.StoreError:
            pass
        time.sleep(0.005)
    time.sleep(0.05)
    assert proc.poll() is None, "the run ended before it could be killed"
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=PATIENCE)
    mid = chainyard.open_store(out).steps_done
    assert 100 <= mid < STEPS
    err = _sample(cfg, out)
    assert "resuming replica 0 at step" in err
    assert_same_store(out, references[kind])


@pytest.mark.parametrize("kind", KINDS)
def test_extension_is_exact(kind: str, tmp_path: Path, references: dict[str, Path]) -> None:
    """A run of 500 steps extended to the full length equals the direct run."""
    cfg = _write(tmp_path, kind, steps=500)
    out = tmp_path / "short.zarr"
    _sample(cfg, out)
    err = _sample(cfg, out, "--steps", str(STEPS))
    assert f"extending replica 0 at step 500 of {STEPS:,}" in err
    assert_same_store(out, references[kind])


@pytest.mark.parametrize("kind", KINDS)
def test_store_layout_and_verify(kind: str, references: dict[str, Path]) -> None:
    """Same groups and arrays for every kind; verify (with a replay of 200 steps) passes."""
    store = chainyard.open_store(references[kind])
    ensemble = chainyard.open_store(references["ensemble"])
    top = sorted(p.name for p in references[kind].iterdir())
    assert top == sorted(p.name for p in references["ensemble"].iterdir())
    extra = ("blob/proposals_per_draw",) if kind == "accept_reject" else ()
    assert store.array_names() == (*ensemble.array_names(), *extra)
    assert store.attrs["walkers"] == store.draws().shape[1]
    res = cli("verify", str(references[kind]), "--replay", "200")
    assert res.returncode == 0, res.stdout + res.stderr
    assert "bitwise identical" in res.stdout + res.stderr
    res = cli("inspect", str(references[kind]))
    assert res.returncode == 0, res.stderr
    if kind != "ensemble":
        assert f"sampler    {kind} (the walkers axis holds independent chains)" in res.stdout
    if kind == "metropolis_hastings":  # the frozen proposal is a recorded decision
        proposal = store.commit_record["random_state"]["proposal"]
        assert proposal["policy"] == "adapted" and proposal["frozen_at_step"] == 300
        assert len(proposal["proposal_sd"]) == 4 and "proposal   adapted:" in res.stdout
    if kind == "accept_reject":
        assert "acceptance rate" in res.stdout and "binomial SE" in res.stdout
