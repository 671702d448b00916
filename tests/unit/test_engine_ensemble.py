"""The ensemble driver against emcee's own loop: the same chain, bit for bit.

chainyard steps emcee's move objects in its own loop (engine/ensemble.py) instead of
``EnsembleSampler.sample``. The reference here is emcee 3.1.6 itself, run with its in-memory
backend from the same start and RNG state: positions, log-probabilities, blobs, acceptance
flags and the RNG state after the last step must be equal, for every move kind, a weighted
mix of moves, vectorised and per-walker models, and blobs.
"""

from __future__ import annotations

import itertools
from pathlib import Path
from typing import Any

import emcee
import numpy as np
import pytest

import chainyard
from chainyard.engine.ensemble import EnsembleDriver, build_moves
from chainyard.engine.protocol import StepBlock, fill_block
from chainyard.errors import ConfigError, ModelError
from chainyard.model import load_model
from chainyard.streams import random_state_from_json, random_state_to_json, states_equal

WALKERS, NDIM, STEPS = 16, 3, 150

SCALAR = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * (theta[0] * theta[0] + 2.0 * theta[1] * theta[1] + theta[2] * theta[2])
"""

VECTOR = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * (theta[:, 0] * theta[:, 0] + 2.0 * theta[:, 1] * theta[:, 1]
                   + theta[:, 2] * theta[:, 2])
"""

ONE_BLOB = """
def log_prob(theta, data):
    lp = -0.5 * (theta[0] * theta[0] + 2.0 * theta[1] * theta[1] + theta[2] * theta[2])
    return lp, theta[0] + theta[1]
"""

TWO_BLOBS = """
def log_prob(theta, data):
    lp = -0.5 * (theta[0] * theta[0] + 2.0 * theta[1] * theta[1] + theta[2] * theta[2])
    return lp, theta[0] * theta[2], theta[1] - 1.0
"""

MOVES: dict[str, list[dict[str, Any]]] = {
    "stretch": [{"kind": "stretch", "scale": 2.5}],
    "walk": [{"kind": "walk", "subset_size": 4}],
    "de": [{"kind": "differential_evolution"}],
    "de_snooker": [{"kind": "de_snooker"}],
    "gaussian_vector": [{"kind": "gaussian", "proposal_sd": [0.5, 0.3, 0.4], "update": "vector"}],
    "gaussian_random": [{"kind": "gaussian", "proposal_sd": 0.4, "update": "random"}],
    "gaussian_sequential": [{"kind": "gaussian", "proposal_sd": 0.4, "update": "sequential"}],
    "mix": [
        {"kind": "stretch", "weight": 0.5},
        {"kind": "differential_evolution", "weight": 0.3},
        {"kind": "de_snooker", "weight": 0.2},
    ],
    "mix_all": [
        {"kind": "walk", "weight": 1.0},
        {"kind": "gaussian", "proposal_sd": 0.3, "weight": 2.0},
        {"kind": "stretch", "weight": 3.0},
    ],
}


def _setup(
    tmp_path: Path, text: str, moves: list[dict[str, Any]], vectorized: bool, blobs: list[str]
) -> tuple[Any, Any, dict[str, Any]]:
    (tmp_path / "model.py").write_text(text)
    raw = {
        "model": {"log_prob": "model.py:log_prob", "vectorized": vectorized},
        "parameters": [
            {"name": f"p{i}", "init": {"normal": {"loc": 0.0, "scale": 1.0}}} for i in range(NDIM)
        ],
        "sampler": {"walkers": WALKERS, "steps": STEPS, "moves": moves, "blobs": blobs},
        "seed": 3,
    }
    cfg = chainyard.parse_config(raw, base_dir=tmp_path)
    namespace: dict[str, Any] = {}
    exec(compile(text, "model.py", "exec"), namespace)
    return cfg, load_model(cfg), namespace["log_prob"]


def _compare(
    cfg: Any, model: Any, bare: Any, vectorized: bool, n_blobs: int, fill: bool = False
) -> None:
    rng = np.random.default_rng(11)
    pos = rng.normal(size=(WALKERS, NDIM))
    out = model(pos)
    lp = out if n_blobs == 0 else out[:, 0]
    blobs = np.empty((WALKERS, 0)) if n_blobs == 0 else out[:, 1:]
    start_rng = np.random.RandomState(2024)
    state0 = start_rng.get_state()

    driver = EnsembleDriver(
        model,
        cfg.sampler.moves,
        pos,
        lp,
        blobs,
        random_state_to_json(state0),
        check_start=True,
    )
    if fill:  # the run loop's way: blocks of steps straight into its buffer
        block = StepBlock(
            np.empty((STEPS, WALKERS, NDIM)),
            np.empty((STEPS, WALKERS)),
            np.zeros((STEPS, WALKERS), dtype=bool),
            np.empty((n_blobs, STEPS, WALKERS)),
        )
        for a, b in itertools.pairwise((0, 1, 5, 64, STEPS)):
            fill_block(driver, block, a, b)
        got = [
            (block.position[k], block.log_prob[k], block.accepted[k], block.blobs[:, k].T)
            for k in range(STEPS)
        ]
    else:
        got = [
            (r.position.copy(), r.log_prob.copy(), r.accepted.copy(), r.blobs.copy())
            for r in driver.steps(STEPS)
        ]

    sampler = emcee.EnsembleSampler(
        WALKERS,
        NDIM,
        bare,
        moves=build_moves(cfg.sampler.moves, NDIM),
        vectorize=vectorized,
        args=(None,),
    )
    sampler.random_state = state0
    emcee_blobs = None if n_blobs == 0 else (blobs[:, 0] if n_blobs == 1 else blobs)
    accepted = np.zeros(WALKERS, dtype=int)
    for k, state in enumerate(
        sampler.sample(
            emcee.State(pos.copy(), log_prob=lp.copy(), blobs=emcee_blobs), iterations=STEPS
        )
    ):
        assert np.array_equal(got[k][0], state.coords), f"position differs at step {k}"
        assert np.array_equal(got[k][1], state.log_prob), f"log_prob differs at step {k}"
        now = sampler.backend.accepted
        assert np.array_equal(got[k][2], now - accepted), f"acceptance differs at step {k}"
        accepted = now.copy()
        if n_blobs:
            want = np.asarray(state.blobs, dtype=float).reshape(WALKERS, n_blobs)
            assert np.array_equal(got[k][3], want), f"blobs differ at step {k}"
    assert 0 < accepted.sum() < STEPS * WALKERS
    # the RNG state after the last step: an exact resume starts from here
    after = np.random.RandomState()
    after.set_state(random_state_from_json(driver.random_state()))
    assert states_equal(after.get_state(), sampler.random_state)


@pytest.mark.parametrize("moves", list(MOVES), ids=list(MOVES))
@pytest.mark.parametrize("vectorized", [False, True], ids=["per-walker", "vectorised"])
def test_driver_equals_emcee_sample(tmp_path: Path, moves: str, vectorized: bool) -> None:
    """Source: emcee 3.1.6's EnsembleSampler.sample from the same state and RNG state."""
    text = VECTOR if vectorized else SCALAR
    cfg, model, bare = _setup(tmp_path, text, MOVES[moves], vectorized, [])
    _compare(cfg, model, bare, vectorized, 0)


@pytest.mark.parametrize("moves", ["stretch", "mix"])
@pytest.mark.parametrize("vectorized", [False, True], ids=["per-walker", "vectorised"])
def test_block_fill_equals_emcee_sample(tmp_path: Path, moves: str, vectorized: bool) -> None:
    """Source: emcee 3.1.6's EnsembleSampler.sample; the driver fills blocks of steps (a lone
    stretch move is stepped in numpy, see EnsembleDriver.fill)."""
    text = VECTOR if vectorized else SCALAR
    cfg, model, bare = _setup(tmp_path, text, MOVES[moves], vectorized, [])
    _compare(cfg, model, bare, vectorized, 0, fill=True)


@pytest.mark.parametrize("moves", ["stretch", "mix"])
def test_block_fill_equals_emcee_sample_with_blobs(tmp_path: Path, moves: str) -> None:
    """Source: emcee 3.1.6's EnsembleSampler.sample, blobs included, filled in blocks."""
    cfg, model, bare = _setup(tmp_path, TWO_BLOBS, MOVES[moves], False, ["a", "b"])
    _compare(cfg, model, bare, False, 2, fill=True)


@pytest.mark.parametrize(
    "text,names", [(ONE_BLOB, ["s"]), (TWO_BLOBS, ["a", "b"])], ids=["one-blob", "two-blobs"]
)
@pytest.mark.parametrize("moves", ["stretch", "mix"])
def test_driver_equals_emcee_sample_with_blobs(
    tmp_path: Path, text: str, names: list[str], moves: str
) -> None:
    """Source: emcee 3.1.6's EnsembleSampler.sample, whose blobs come from the same tuples."""
    cfg, model, bare = _setup(tmp_path, text, MOVES[moves], False, names)
    _compare(cfg, model, bare, False, len(names))


def test_dependent_start_is_a_config_error(tmp_path: Path) -> None:
    """emcee's linear-independence check of the start runs on fresh starts only."""
    cfg, model, _ = _setup(tmp_path, SCALAR, MOVES["stretch"], False, [])
    pos = np.tile(np.array([[0.1, 0.2, 0.3]]), (WALKERS, 1))
    rs = random_state_to_json(np.random.RandomState(1).get_state())
    lp = model(pos)
    driver = EnsembleDriver(
        model, cfg.sampler.moves, pos, lp, np.empty((WALKERS, 0)), rs, check_start=True
    )
    with pytest.raises(ConfigError, match="not linearly independent"):
        next(driver.steps(1))


def test_non_finite_proposal_is_a_model_error(tmp_path: Path) -> None:
    """A walker at +inf (diverged) stops the run with a one-line ModelError."""
    cfg, model, _ = _setup(tmp_path, SCALAR, MOVES["stretch"], False, [])
    pos = np.random.default_rng(5).normal(size=(WALKERS, NDIM))
    lp = model(pos)
    pos[3, 1] = np.inf
    rs = random_state_to_json(np.random.RandomState(1).get_state())
    driver = EnsembleDriver(
        model, cfg.sampler.moves, pos, lp, np.empty((WALKERS, 0)), rs, check_start=False
    )
    with pytest.raises(ModelError, match="non-finite position"):
        for _ in driver.steps(5):
            pass
