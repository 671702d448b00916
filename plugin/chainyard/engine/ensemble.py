"""The affine-invariant ensemble sampler driver (emcee 3.1; Goodman and Weare 2010).

Exact resume rests on two facts about emcee 3.1.6's moves (checked in the test suite): a
step's draws come only from the MT19937 ``RandomState`` handed to the move, and the state
after a step is fully described by positions, log-probabilities, blobs and that RNG state.
The RNG state is set with ``RandomState.set_state`` and read back to verify it (emcee's own
``random_state`` setter would swallow a malformed state silently).
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import emcee
import numpy as np
from emcee.ensemble import walkers_independent
from emcee.model import Model
from numpy.typing import NDArray

from chainyard.config import (
    DESnookerMove,
    DifferentialEvolutionMove,
    GaussianMove,
    MoveSpec,
    RunConfig,
    StretchMove,
    WalkMove,
)
from chainyard.engine.protocol import StepBlock, StepRows, copy_steps
from chainyard.engine.registry import SamplerKind, register
from chainyard.errors import ConfigError, ModelError
from chainyard.model import LoadedModel
from chainyard.streams import (
    random_state_from_json,
    random_state_to_json,
    sampler_random_state,
    states_equal,
)

__all__ = ["KIND", "EnsembleDriver", "build_moves"]

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


class EnsembleDriver:
    """Steps emcee's ensemble moves from a given state and RNG state.

    The moves are emcee's own objects (``propose``), stepped here rather than through
    ``EnsembleSampler.sample``, whose loop also copies the whole RNG state into every step's
    ``State`` (a 624-word copy, ~30 us), validates the move weights at every step
    (``RandomState.choice``, ~8 us) and converts each walker's log-probability to a Python
    float one at a time. Neither changes a draw: the move is chosen with the same single
    uniform draw and cumulative-weight search that ``choice`` makes, so the chain and the RNG
    state equal ``EnsembleSampler.sample``'s bit for bit (checked against emcee itself in
    tests/unit/test_engine_ensemble.py).

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
        self._walkers = walkers
        self._n_blobs = model.n_blobs
        self._model = _DeferErrors(model)
        built = build_moves(moves, n_params)
        self._moves = [m for m, _ in built]
        weights = np.array([w for _, w in built], dtype=np.float64)
        weights /= np.sum(weights)  # as EnsembleSampler normalises them
        self._cdf = weights.cumsum()  # as RandomState.choice builds it from p
        self._cdf /= self._cdf[-1]
        wanted = random_state_from_json(random_state)
        self._rng = np.random.RandomState()  # emcee's generator (legacy MT19937)
        self._rng.set_state(wanted)
        if not states_equal(self._rng.get_state(), wanted):
            raise RuntimeError("the sampler's random state did not take")
        self._emcee_model = Model(self._model, self._compute, map, self._rng)
        self._state = emcee.State(
            np.array(position, dtype=np.float64),
            log_prob=np.array(log_prob, dtype=np.float64),
            blobs=self._to_emcee_blobs(blobs),
        )
        self._check_start = check_start
        move = self._moves[0]
        # the stretch move is stepped in numpy (fill) when it is the only move, as emcee
        # configures it (two halves, shuffled split) and with enough walkers for emcee
        self._stretch = (
            len(self._moves) == 1
            and type(move) is emcee.moves.StretchMove
            and self._n_blobs == 0
            and move.nsplits == 2
            and move.randomize_split
            and walkers >= 2 * n_params
        )

    def _to_emcee_blobs(self, blobs: NDArray[np.float64]) -> NDArray[np.float64] | None:
        if self._n_blobs == 0:
            return None
        return np.array(blobs[:, 0] if self._n_blobs == 1 else blobs, dtype=np.float64)

    def _from_emcee_blobs(self, blobs: Any) -> NDArray[np.float64]:
        if self._n_blobs == 0:
            return _NO_BLOBS
        return np.asarray(blobs, dtype=np.float64).reshape(self._walkers, self._n_blobs)

    def _compute(
        self, coords: NDArray[np.float64]
    ) -> tuple[NDArray[np.float64], NDArray[np.float64] | None]:
        """Log-probabilities (and blobs) of proposed positions, shaped as emcee's moves
        expect them from ``EnsembleSampler.compute_log_prob``."""
        total = float(np.add.reduce(coords, axis=None))  # one pass; exact check if not finite
        if not -np.inf < total < np.inf and not np.isfinite(coords).all():
            raise ModelError(
                "the sampler proposed a non-finite position (the walkers have diverged: "
                "check the model for log-probabilities that grow without bound)"
            )
        out = self._model(coords)
        if self._n_blobs == 0:
            return out, None
        blobs = out[:, 1].copy() if self._n_blobs == 1 else out[:, 1:].copy()
        return out[:, 0].copy(), blobs

    def steps(self, n: int) -> Iterator[StepRows]:
        """Advance ``n`` steps; see :class:`chainyard.engine.protocol.SamplerDriver`."""
        if n <= 0:
            return
        state = self._state
        if self._check_start:
            if not walkers_independent(state.coords):
                raise ConfigError(
                    "parameters[*].init: the initial walkers are not linearly independent "
                    "(emcee's check); widen the init scales or use more spread-out positions"
                )
            self._check_start = False
        rng, moves, cdf, model, guard = (
            self._rng,
            self._moves,
            self._cdf,
            self._emcee_model,
            self._model,
        )
        single = len(moves) == 1
        for _ in range(n):
            u = rng.random_sample()  # RandomState.choice(moves, p=weights) draws exactly this
            move = moves[0] if single else moves[int(cdf.searchsorted(u, side="right"))]
            state, accepted = move.propose(model, state)  # updates ``state`` in place
            self._state = state
            if guard.error is not None:
                raise guard.error
            yield StepRows(
                state.coords, state.log_prob, accepted, self._from_emcee_blobs(state.blobs)
            )

    def fill(self, block: StepBlock, a: int, b: int) -> None:
        """Take steps ``a .. b - 1`` into rows ``a .. b - 1`` of the run loop's buffer.

        A lone stretch move without blobs (the default) is stepped here in numpy, with the
        draws of emcee's ``RedBlueMove.propose`` in the same order from the same generator:
        the move-choice uniform, the shuffle of the red/blue split, then per half ``rand(Ns)``
        for the stretch factors, ``randint(Nc, size=Ns)`` for the partners, and ``Ns``
        uniforms for the accept test (emcee draws them one at a time; MT19937 gives the same
        doubles either way). Each walker's accept test is emcee's ``f + lp' - lp > log u``
        on the same float64 values, so the chain is emcee's bit for bit (checked against
        emcee in tests/unit/test_engine_ensemble.py). Other moves take :meth:`steps`.
        """
        if not self._stretch:
            copy_steps(self, block, a, b)
            return
        state = self._state
        if self._check_start:
            if not walkers_independent(state.coords):
                raise ConfigError(
                    "parameters[*].init: the initial walkers are not linearly independent "
                    "(emcee's check); widen the init scales or use more spread-out positions"
                )
            self._check_start = False
        rng, scale, compute = self._rng, self._moves[0].a, self._compute_checked
        walkers, ndim = state.coords.shape
        all_inds = np.arange(walkers)
        position, log_prob, accepted, _ = block
        prev, prev_lp = state.coords, state.log_prob
        for k in range(a, b):
            rng.random_sample()  # the move choice (one move: drawn, as emcee does, and unused)
            coords, lp, acc = position[k], log_prob[k], accepted[k]
            np.copyto(coords, prev)
            np.copyto(lp, prev_lp)
            acc[...] = False
            inds = all_inds % 2
            rng.shuffle(inds)
            for split in (0, 1):
                s1 = inds == split
                s = coords[s1]
                c = coords[inds != split]
                ns, nc = len(s), len(c)
                zz = ((scale - 1.0) * rng.rand(ns) + 1) ** 2.0 / scale
                factors = (ndim - 1.0) * np.log(zz)
                rint = rng.randint(nc, size=(ns,))
                q = c[rint] - (c[rint] - s) * zz[:, None]
                new_lp = compute(q)
                ok = factors + new_lp - lp[s1] > np.log(rng.rand(ns))
                acc[s1] = ok
                m1 = s1 & acc
                coords[m1] = q[ok]
                lp[m1] = new_lp[ok]
            prev, prev_lp = coords, lp
        state.coords[...] = prev
        state.log_prob[...] = prev_lp

    def _compute_checked(self, coords: NDArray[np.float64]) -> NDArray[np.float64]:
        """Log-probabilities of proposed positions (no blobs), errors raised at once."""
        total = float(np.add.reduce(coords, axis=None))  # one pass; exact check if not finite
        if not -np.inf < total < np.inf and not np.isfinite(coords).all():
            raise ModelError(
                "the sampler proposed a non-finite position (the walkers have diverged: "
                "check the model for log-probabilities that grow without bound)"
            )
        return self._model.model.checked(coords)

    def random_state(self) -> dict[str, Any]:
        """The sampler's current RNG state as JSON values."""
        return random_state_to_json(self._rng.get_state())


def _initial_random_state(config: RunConfig, replica: int) -> dict[str, Any]:
    return random_state_to_json(sampler_random_state(config.seed, replica).get_state())


def _make_driver(
    config: RunConfig,
    model: LoadedModel,
    position: NDArray[np.float64],
    log_prob: NDArray[np.float64],
    blobs: NDArray[np.float64],
    random_state: dict[str, Any],
    step: int,
) -> EnsembleDriver:
    return EnsembleDriver(
        model, config.sampler.moves, position, log_prob, blobs, random_state, check_start=step == 0
    )


def _check_random_state(record: Any) -> None:
    random_state_from_json(record or {})  # raises ValueError if malformed


KIND = register(
    SamplerKind(
        name="ensemble",
        identity=EnsembleDriver.kind,
        axis="walkers",
        independent_draws=False,
        engine_blobs=(),
        initial_random_state=_initial_random_state,
        make_driver=_make_driver,
        check_random_state=_check_random_state,
    )
)
