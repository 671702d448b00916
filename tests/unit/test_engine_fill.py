"""Block filling (``fill``) makes exactly the draws of stepping (``steps``), for every kind.

The run loop fills its buffer a block of steps at a time; replay and older stores rest on
``steps``. Both must give the same rows bit for bit and leave the same random state, for
blocks that start and end anywhere (also inside a Metropolis-Hastings or accept-reject block
of pre-drawn randomness, and across the adaptation phase).
"""

from __future__ import annotations

import itertools
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import chainyard
from chainyard.engine.drivers import initial_random_state, make_driver
from chainyard.engine.initial import initial_state
from chainyard.engine.protocol import StepBlock, fill_block
from chainyard.errors import ModelError
from chainyard.model import load_model

DIM = 3
STEPS = 300
CUTS = [0, 1, 7, 64, 255, 256, 257, 300]  # uneven blocks, across K = 256 boundaries

VECTOR = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * np.einsum("ij,ij->i", theta, theta)
"""
SCALAR_BLOBS = """
def log_prob(theta, data):
    return -0.5 * float(theta @ theta), float(theta[0] + theta[1])
"""
KERNEL = """
import numpy as np

def step(state, rng, data):
    return 0.5 * state + 0.8660254037844386 * rng.standard_normal(state.shape)

def step_lp(state, rng, data):
    new = 0.5 * state + 0.8660254037844386 * rng.standard_normal(state.shape)
    if rng.random() < 0.5:
        return new, -0.5 * float(new @ new)
    return new
"""

SAMPLERS: dict[str, tuple[dict[str, Any], str, bool, list[str]]] = {
    "stretch-vectorised": ({"walkers": 8}, VECTOR, True, []),
    "stretch-per-walker-blobs": ({"walkers": 8, "blobs": ["s"]}, SCALAR_BLOBS, False, ["s"]),
    "ensemble-mix": (
        {"walkers": 8, "moves": [{"kind": "stretch", "weight": 1}, {"kind": "walk", "weight": 1}]},
        VECTOR,
        True,
        [],
    ),
    "mh-fixed": (
        {"kind": "metropolis_hastings", "chains": 3, "proposal_sd": 0.8},
        VECTOR,
        True,
        [],
    ),
    "mh-adaptive-blobs": (
        {
            "kind": "metropolis_hastings",
            "chains": 3,
            "proposal_sd": 0.8,
            "adapt_steps": 120,
            "blobs": ["s"],
        },
        SCALAR_BLOBS,
        False,
        ["s"],
    ),
    "kernel": ({"kind": "kernel", "kernel": "kernel.py:step", "chains": 3}, VECTOR, True, []),
    "kernel-some-lp": (
        {"kind": "kernel", "kernel": "kernel.py:step_lp", "chains": 3},
        VECTOR,
        True,
        [],
    ),
    "accept-reject": (
        {
            "kind": "accept_reject",
            "envelope": [{"normal": {"loc": 0.0, "scale": 2.0}}] * DIM,
            "log_bound": 5.0,  # >= DIM (log 2 + log(2 pi) / 2), the max of log f - log g
            "chains": 3,
            "draws": STEPS,
        },
        VECTOR,
        True,
        [],
    ),
}


def _driver(tmp_path: Path, name: str) -> tuple[Any, Any]:
    sampler, text, vectorized, _ = SAMPLERS[name]
    (tmp_path / "model.py").write_text(text)
    (tmp_path / "kernel.py").write_text(KERNEL)
    sampler = {"steps": STEPS, **sampler} if "draws" not in sampler else dict(sampler)
    cfg = chainyard.parse_config(
        {
            "model": {"log_prob": "model.py:log_prob", "vectorized": vectorized},
            "parameters": [
                {"name": f"p{i}", "init": {"normal": {"loc": 0.0, "scale": 1.0}}}
                for i in range(DIM)
            ],
            "sampler": sampler,
            "seed": 5,
        },
        base_dir=tmp_path,
    )
    model = load_model(cfg)
    x, lp, blobs, _ = initial_state(cfg, model, 0)
    state = initial_random_state(cfg, 0)
    return (
        make_driver(cfg, model, x, lp, blobs, state, step=0),
        make_driver(cfg, model, x, lp, blobs, state, step=0),
    )


@pytest.mark.parametrize("name", list(SAMPLERS))
def test_fill_equals_steps(tmp_path: Path, name: str) -> None:
    """Rows and final random state of uneven blocks equal those of steps (bit for bit)."""
    stepped, filled = _driver(tmp_path, name)
    walkers, n_params = (8 if name.startswith(("stretch", "ensemble")) else 3), DIM
    n_blobs = len(SAMPLERS[name][3]) + (1 if name == "accept-reject" else 0)
    block = StepBlock(
        np.full((STEPS, walkers, n_params), np.nan),
        np.full((STEPS, walkers), np.nan),
        np.zeros((STEPS, walkers), dtype=bool),
        np.full((n_blobs, STEPS, walkers), np.nan),
    )
    for a, b in itertools.pairwise(CUTS):
        fill_block(filled, block, a, b)
    for k, r in enumerate(stepped.steps(STEPS)):
        assert np.array_equal(block.position[k], r.position), f"position differs at step {k}"
        assert np.array_equal(block.log_prob[k], r.log_prob), f"log_prob differs at step {k}"
        assert np.array_equal(block.accepted[k], r.accepted), f"accepted differs at step {k}"
        if n_blobs:
            assert np.array_equal(block.blobs[:, k], r.blobs.T), f"blobs differ at step {k}"
    assert 0 < block.accepted.sum() <= block.accepted.size
    assert filled.random_state() == stepped.random_state()


@pytest.mark.parametrize("start,sd", [(np.inf, 0.8), (1.7e308, 1e307)], ids=["inf", "overflow"])
def test_mh_fill_stops_on_a_non_finite_proposal(tmp_path: Path, start: float, sd: float) -> None:
    """A chain at +inf, or one whose proposal overflows, stops the filled block with the
    driver's one-line error, as stepping does."""
    (tmp_path / "model.py").write_text(VECTOR)
    cfg = chainyard.parse_config(
        {
            "model": {"log_prob": "model.py:log_prob", "vectorized": True},
            "parameters": [
                {"name": f"p{i}", "init": {"normal": {"loc": 0.0, "scale": 1.0}}}
                for i in range(DIM)
            ],
            "sampler": {"kind": "metropolis_hastings", "chains": 2, "proposal_sd": sd, "steps": 9},
            "seed": 5,
        },
        base_dir=tmp_path,
    )
    model = load_model(cfg)
    x = np.zeros((2, DIM))
    x[1, 0] = start
    for take in ("steps", "fill"):
        driver = make_driver(
            cfg, model, x, np.zeros(2), np.empty((2, 0)), initial_random_state(cfg, 0), step=0
        )
        block = StepBlock(
            np.empty((9, 2, DIM)),
            np.empty((9, 2)),
            np.empty((9, 2), dtype=bool),
            np.empty((0, 9, 2)),
        )
        with pytest.raises(ModelError, match="the sampler proposed a non-finite position"):
            if take == "steps":
                list(driver.steps(9))
            else:
                fill_block(driver, block, 0, 9)
