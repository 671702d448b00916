"""A fifth sampler kind, declared in one module of its own (here, this test), runs end to end.

The kind draws every chain's step independently from N(0, I), the target's own
distribution: a trivial independence sampler whose draws are exact for the standard normal
target (mean 0, variance 1: analytic). Nothing outside this file names it: its settings are
registered with the config, its driver and records with the engine's registry, and the run
loop, store, resume and extension work as for the built-in kinds.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pytest
from numpy.typing import NDArray
from pydantic import Field

import chainyard
from chainyard.config import ChainSamplerSpec, RunConfig, register_sampler_spec
from chainyard.engine.chains import (
    check_chain_states,
    fresh_chain_states,
    generator_to_json,
    generators_from_json,
)
from chainyard.engine.protocol import StepRows
from chainyard.engine.registry import SamplerKind, register, sampler_kind
from chainyard.model import LoadedModel
from tests.conftest import assert_same_store, base_config, write_run

KIND_NAME = "test_independent_normal"


class IndependentNormalSpec(ChainSamplerSpec):
    """Settings of the test kind: chains and steps."""

    kind: Literal["test_independent_normal"]
    steps: int = Field(ge=1)

    @property
    def blobs(self) -> tuple[str, ...]:
        return ()


class IndependentNormalDriver:
    """Every step of every chain is a fresh N(0, I) draw from the chain's own stream."""

    kind = "tests.independent_normal"

    def __init__(self, model: LoadedModel, random_state: dict[str, Any], chains: int) -> None:
        self._model = model
        self._gens = generators_from_json(random_state["chains"], chains)

    def steps(self, n: int) -> Iterator[StepRows]:
        accepted = np.ones(len(self._gens), dtype=bool)
        no_blobs = np.empty((len(self._gens), 0))
        for _ in range(n):
            x = np.stack([g.standard_normal(len(self._model.param_names)) for g in self._gens])
            out = self._model(x)
            yield StepRows(x, out if out.ndim == 1 else out[:, 0], accepted, no_blobs)

    def random_state(self) -> dict[str, Any]:
        return {"sampler": KIND_NAME, "chains": [generator_to_json(g) for g in self._gens]}


def _make_driver(
    config: RunConfig,
    model: LoadedModel,
    position: NDArray[np.float64],
    log_prob: NDArray[np.float64],
    blobs: NDArray[np.float64],
    random_state: dict[str, Any],
    step: int,
) -> IndependentNormalDriver:
    return IndependentNormalDriver(model, random_state, position.shape[0])


def _initial(config: RunConfig, replica: int) -> dict[str, Any]:
    chains = fresh_chain_states(config.seed, replica, config.sampler.chains)
    return {"sampler": KIND_NAME, "chains": chains}


register_sampler_spec(IndependentNormalSpec)
register(
    SamplerKind(
        name=KIND_NAME,
        identity=IndependentNormalDriver.kind,
        axis="chains",
        independent_draws=True,
        engine_blobs=(),
        initial_random_state=_initial,
        make_driver=_make_driver,
        check_random_state=check_chain_states,
    )
)

PARAMETERS = [
    {"name": "x", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
    {"name": "y", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
]
STORAGE = {"chunk_steps": 64, "commit_every_steps": 50}


def _write(folder: Path, steps: int) -> Path:
    sampler = {"kind": KIND_NAME, "chains": 4, "steps": steps}
    config = base_config(parameters=PARAMETERS, storage=STORAGE)
    config["sampler"] = sampler
    return write_run(folder, config)


def _config(folder: Path, steps: int) -> RunConfig:
    return chainyard.load_config(_write(folder, steps))


def test_the_registry_answers_for_the_new_kind() -> None:
    kind = sampler_kind(KIND_NAME)
    assert kind.identity == "tests.independent_normal" and kind.independent_draws
    with pytest.raises(KeyError, match="unknown sampler kind 'no_such_kind'"):
        sampler_kind("no_such_kind")


def test_a_fifth_kind_samples_resumes_and_extends_exactly(tmp_path: Path) -> None:
    direct = chainyard.sample(_config(tmp_path / "a", 600), tmp_path / "direct.zarr")
    assert direct.steps_done == 600
    assert direct.attrs["identity"]["sampler_kind"] == "tests.independent_normal"
    x = direct.draws().reshape(-1, 2)
    # exact N(0, I) draws: mean 0 and variance 1 (analytic), 2,400 draws per parameter
    assert np.all(np.abs(x.mean(axis=0)) < 5 / np.sqrt(x.shape[0]))
    assert np.all(np.abs(x.var(axis=0) - 1.0) < 5 * np.sqrt(2.0 / x.shape[0]))

    chainyard.sample(_config(tmp_path / "b", 250), tmp_path / "extended.zarr")
    extended = chainyard.sample(_config(tmp_path / "b", 600), tmp_path / "extended.zarr")
    assert extended.steps_done == 600
    assert_same_store(direct.path, extended.path)


def test_the_config_names_its_own_settings_in_errors(tmp_path: Path) -> None:
    path = _write(tmp_path, 0)
    with pytest.raises(chainyard.ConfigError, match=r"sampler\.steps = 0"):
        chainyard.load_config(path)
