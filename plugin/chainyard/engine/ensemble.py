"""The affine-invariant ensemble sampler driver (emcee 3.1; Goodman and Weare 2010).

Exact resume rests on three facts about emcee 3.1.6 (checked in the test suite): every step
draws a fixed amount from the sampler's MT19937 ``RandomState``; the state after a step is
fully described by positions, log-probabilities, blobs and that RNG state; and emcee's
``random_state`` setter swallows malformed states silently, so the state is verified after
it is set.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import emcee
import numpy as np
from numpy.typing import NDArray

from chainyard.config import (
    DESnookerMove,
    DifferentialEvolutionMove,
    GaussianMove,
    MoveSpec,
    StretchMove,
    WalkMove,
)
from chainyard.engine.protocol import StepRows
from chainyard.errors import ConfigError, ModelError
from chainyard.model import LoadedModel
from chainyard.streams import random_state_from_json, random_state_to_json, states_equal

__all__ = ["EnsembleDriver", "build_moves"]

_NO_BLOBS = np.empty((0, 0))


def build_moves(moves: tuple[MoveSpec, ...], n_params: int) -> list[tuple[Any, float]]:
    """emcee move objects with their weights, from the config's move specs."""
    out: list[tuple[Any, float]] = []
    for m in moves:
        if isinstance(m, StretchMove):
            move: Any = emcee.moves.StretchMove(a=m.scale)
        elif isinstance(m, WalkMove):
            move = emcee.moves.WalkMove(s=m.subset_size)
        elif isinstance(m, DifferentialEvolutionMove):
            move = emcee.moves.DEMove(sigma=m.jitter, gamma0=m.step_factor)
        elif isinstance(m, DESnookerMove):
            move = emcee.moves.DESnookerMove(gammas=m.step_factor)
        elif isinstance(m, GaussianMove):
            sd = np.asarray(m.proposal_sd, dtype=np.float64)
            cov: Any = float(sd) ** 2 if sd.ndim == 0 else sd**2
            move = emcee.moves.GaussianMove(cov, mode=m.update)
        else:  # pragma: no cover - the config union is closed
            raise TypeError(f"unknown move {m!r}")
        out.append((move, float(m.weight)))
    return out


class _DeferErrors:
    """Hands emcee -inf instead of raising, and keeps the error for the run loop.

    emcee prints a traceback for any exception raised by the log-probability function; a
    user's model error must reach the user as one line, so it is raised after the step.
    """

    def __init__(self, model: LoadedModel) -> None:
        self.model = model
        self.error: ModelError | None = None

    def __call__(self, thetas: NDArray[np.float64]) -> NDArray[np.float64]:
        try:
            return self.model(thetas)
        except ModelError as exc:
            self.error = self.error or exc
            n = thetas.shape[0]
            if self.model.n_blobs:
                out = np.full((n, 1 + self.model.n_blobs), np.nan)
                out[:, 0] = -np.inf
                return out
            return np.full(n, -np.inf)


class _StepRecorder(emcee.backends.Backend):  # type: ignore[misc]
    """A backend that keeps only the latest step's acceptance flags (nothing accumulates)."""

    def grow(self, ngrow: int, blobs: Any) -> None:
        return None

    def save_step(self, state: emcee.State, accepted: NDArray[np.bool_]) -> None:
        self.last_accepted = accepted


class EnsembleDriver:
    """Runs emcee's ``EnsembleSampler`` from a given state and RNG state.

    Parameters
    ----------
    model : LoadedModel
        The guarded log-probability evaluator.
    moves : tuple of MoveSpec
        Proposal moves from the config.
    position : ndarray, shape (walkers, params)
        Current positions.
    log_prob : ndarray, shape (walkers,)
        Current log-probabilities.
    blobs : ndarray, shape (walkers, n_blobs)
        Current blobs (n_blobs may be 0).
    random_state : dict
        RNG state as produced by :func:`chainyard.streams.random_state_to_json`.
    check_start : bool
        Run emcee's check that the walkers are linearly independent (fresh starts only).
    """

    kind = "emcee.ensemble"

    def __init__(
        self,
        model: LoadedModel,
        moves: tuple[MoveSpec, ...],
        position: NDArray[np.float64],
        log_prob: NDArray[np.float64],
        blobs: NDArray[np.float64],
        random_state: dict[str, Any],
        *,
        check_start: bool,
    ) -> None:
        walkers, n_params = position.shape
        self._n_blobs = model.n_blobs
        self._recorder = _StepRecorder()
        self._model = _DeferErrors(model)
        self._sampler = emcee.EnsembleSampler(
            walkers,
            n_params,
            self._model,
            moves=build_moves(moves, n_params),
            vectorize=True,
            backend=self._recorder,
        )
        wanted = random_state_from_json(random_state)
        self._sampler.random_state = wanted
        if not states_equal(self._sampler.random_state, wanted):
            raise RuntimeError("emcee did not accept the sampler's random state")
        self._state = emcee.State(
            np.array(position, dtype=np.float64),
            log_prob=np.array(log_prob, dtype=np.float64),
            blobs=self._to_emcee_blobs(blobs),
            random_state=wanted,
        )
        self._check_start = check_start

    def _to_emcee_blobs(self, blobs: NDArray[np.float64]) -> NDArray[np.float64] | None:
        if self._n_blobs == 0:
            return None
        return np.array(blobs[:, 0] if self._n_blobs == 1 else blobs, dtype=np.float64)

    def _from_emcee_blobs(self, blobs: Any, walkers: int) -> NDArray[np.float64]:
        if self._n_blobs == 0:
            return _NO_BLOBS
        return np.asarray(blobs, dtype=np.float64).reshape(walkers, self._n_blobs)

    def steps(self, n: int) -> Iterator[StepRows]:
        """Advance ``n`` steps; see :class:`chainyard.engine.protocol.SamplerDriver`."""
        if n <= 0:
            return
        try:
            gen = self._sampler.sample(
                self._state,
                iterations=n,
                store=True,
                skip_initial_state_check=not self._check_start,
                progress=False,
            )
            first = True
            for state in gen:
                if self._model.error is not None:
                    raise self._model.error
                if first:
                    first = False
                    self._check_start = False
                walkers = state.coords.shape[0]
                self._state = state
                yield StepRows(
                    position=state.coords,
                    log_prob=state.log_prob,
                    accepted=self._recorder.last_accepted,
                    blobs=self._from_emcee_blobs(state.blobs, walkers),
                )
        except ValueError as exc:
            if "condition number" in str(exc):
                raise ConfigError(
                    "parameters[*].init: the initial walkers are not linearly independent "
                    "(emcee's check); widen the init scales or use more spread-out positions"
                ) from None
            raise
        self._state = emcee.State(self._state, copy=True)

    def random_state(self) -> dict[str, Any]:
        """The sampler's current RNG state as JSON values."""
        return random_state_to_json(self._sampler.random_state)
