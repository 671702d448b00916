"""Random-walk Metropolis-Hastings on independent chains (Metropolis et al. 1953; Hastings 1970).

Each chain proposes ``x' = x + sd * z`` with ``z ~ N(0, I)`` from its own stream and accepts
with probability ``min(1, pi(x') / pi(x))`` (the proposal is symmetric). A chain's stream is
read in blocks of ``K`` steps (:func:`block_steps`; steps ``bK .. bK + K - 1`` form block b):
``K x params`` standard normals, then ``K`` uniforms, whatever the outcomes, so a chain's
draws depend only on its own stream and not on where commits fall. The record holds every
chain's stream state at the start of the current block; resume draws that block again and
skips the steps already taken. All chains' proposals are evaluated in one model call per step.

Adaptation (optional, ``adapt_steps > 0``): during the first ``adapt_steps`` steps each
chain's proposal scale ``s`` (a factor on ``proposal_sd``) is tuned by a Robbins-Monro update
after every window of ``ADAPT_WINDOW`` steps, ``log s += (a_hat - a*) / sqrt(k)`` for the
k-th window with acceptance rate ``a_hat`` (Robbins and Monro 1951; Andrieu and Thoms 2008,
section 4), towards ``a*`` = 0.234 for several parameters or 0.44 for one (Roberts, Gelman
and Gilks 1997; Roberts and Rosenthal 2001). The scale is frozen after the phase; the
frozen proposal is recorded with the random state in every commit (``proposal``), which is
what exact resume restores. The adaptation steps are stored; burn-in decides what to drop.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.config import MetropolisSpec, RunConfig
from chainyard.engine.chains import (
    check_chain_states,
    fresh_chain_states,
    generator_to_json,
    generators_from_json,
)
from chainyard.engine.protocol import StepBlock, StepRows
from chainyard.engine.registry import SamplerKind, register
from chainyard.errors import ModelError
from chainyard.model import LoadedModel

__all__ = [
    "ADAPT_WINDOW",
    "KIND",
    "MetropolisDriver",
    "accepts",
    "block_steps",
    "initial_metropolis_state",
    "target_acceptance",
]

#: steps per adaptation window
ADAPT_WINDOW = 50
#: proposals below this size (in every coordinate) are finite with room to spare
_FINITE_BOUND = 1e300


def accepts(
    log_u: NDArray[np.float64] | float,
    lp_new: NDArray[np.float64] | float,
    lp: NDArray[np.float64] | float,
) -> NDArray[np.bool_]:
    """The Metropolis rule for a symmetric proposal: accept when ``log u < lp_new - lp``,
    with ``u`` uniform on (0, 1], i.e. with probability ``min(1, pi(x') / pi(x))``. A
    proposal at -inf is never accepted; NaN never compares true."""
    return np.less(log_u, np.subtract(lp_new, lp))


def block_steps(chains: int, n_params: int) -> int:
    """Steps per block of pre-drawn proposals: 256, fewer for large runs (the block holds
    ``chains x K x params`` float64, at most about 8 MiB)."""
    return max(1, min(256, (1 << 20) // max(1, chains * n_params)))


def target_acceptance(spec: MetropolisSpec, n_params: int) -> float:
    """The acceptance rate adaptation aims at: the config's, else 0.44 (1-D) or 0.234."""
    if spec.target_acceptance is not None:
        return float(spec.target_acceptance)
    return 0.44 if n_params == 1 else 0.234


def initial_metropolis_state(spec: MetropolisSpec, seed: int, replica: int) -> dict[str, Any]:
    """The driver record before the first step (fresh streams, scale 1, nothing frozen)."""
    return {
        "sampler": "metropolis_hastings",
        "bit_generator": "PCG64",
        "block": None,  # set by the driver at its first record
        "chains": fresh_chain_states(seed, replica, spec.chains),
        "log_scale": [0.0] * spec.chains,
        "window_accepted": [0] * spec.chains,
        "proposal": None,
    }


class MetropolisDriver:
    """Steps independent random-walk Metropolis-Hastings chains.

    Parameters
    ----------
    model : LoadedModel
        The guarded log-probability evaluator.
    spec : MetropolisSpec
        The sampler settings.
    position : ndarray, shape (chains, params)
    log_prob : ndarray, shape (chains,)
    blobs : ndarray, shape (chains, n_blobs)
        The state after the last stored step.
    random_state : dict
        The driver record (:func:`initial_metropolis_state` or a commit's).
    step : int
        Steps already taken (the store's ``steps_done``).
    """

    kind = "chainyard.metropolis_hastings"

    def __init__(
        self,
        model: LoadedModel,
        spec: MetropolisSpec,
        position: NDArray[np.float64],
        log_prob: NDArray[np.float64],
        blobs: NDArray[np.float64],
        random_state: dict[str, Any],
        step: int,
    ) -> None:
        chains, n_params = position.shape
        self._model = model
        self._gens = generators_from_json(random_state.get("chains"), chains)
        self._x = np.array(position, dtype=np.float64)
        self._lp = np.array(log_prob, dtype=np.float64)
        self._blobs = np.array(blobs, dtype=np.float64).reshape(chains, -1)
        sd = np.asarray(spec.proposal_sd, dtype=np.float64)
        self._sd = np.broadcast_to(sd, (n_params,)).copy()
        self._log_scale = np.array(random_state.get("log_scale", [0.0] * chains), dtype=float)
        self._window = np.array(random_state.get("window_accepted", [0] * chains), dtype=int)
        if self._log_scale.shape != (chains,) or self._window.shape != (chains,):
            raise ValueError("malformed Metropolis-Hastings state: one scale per chain expected")
        self._proposal = random_state.get("proposal")
        self._adapt_steps = spec.adapt_steps
        self._target = target_acceptance(spec, n_params)
        self._step = int(step)
        self._sd_rows = self._sd * np.exp(self._log_scale)[:, None]
        block = random_state.get("block")
        self._block = int(block) if block is not None else block_steps(chains, n_params)
        if self._block < 1:
            raise ValueError("malformed Metropolis-Hastings state: block must be >= 1")
        self._starts = [generator_to_json(g) for g in self._gens]
        self._z = np.empty((chains, self._block, n_params))
        self._log_u = np.empty((chains, self._block))
        self._z_max = np.inf  # max |z| of the current block (set when it is drawn)
        if self._step % self._block:  # inside a block: draw it again from its recorded start
            self._draw_block()

    def _draw_block(self) -> None:
        """Every chain's normals and uniforms for the next ``K`` steps, from its own stream."""
        self._starts = [generator_to_json(g) for g in self._gens]
        for c, g in enumerate(self._gens):
            g.standard_normal(out=self._z[c])
            self._log_u[c] = np.log1p(-g.random(self._block))
        self._z_max = float(np.abs(self._z).max())

    def _finite_for(self, x: NDArray[np.float64], n: int) -> bool:
        """Whether the proposals of the next ``n`` steps from ``x`` are certainly finite
        (steps of the current block, proposal scales fixed): each step moves a coordinate by
        at most ``max |z| * max sd``, so no proposal passes ``max |x| + n`` such moves. One
        check for ``n`` steps instead of a finiteness check of every proposal (NaN or inf in
        ``x`` makes it False)."""
        bound = float(np.abs(x).max()) + n * self._z_max * float(self._sd_rows.max())
        return bound < _FINITE_BOUND

    def _adapt(self, accepted: NDArray[np.bool_]) -> None:
        """Window bookkeeping and the Robbins-Monro update (adaptation phase only)."""
        self._window += accepted
        s = self._step  # steps taken, this one included
        start = ((s - 1) // ADAPT_WINDOW) * ADAPT_WINDOW
        if s % ADAPT_WINDOW == 0 or s == self._adapt_steps:
            k = s // ADAPT_WINDOW + (1 if s % ADAPT_WINDOW else 0)
            rate = self._window / float(s - start)
            self._log_scale += (rate - self._target) / math.sqrt(k)
            self._sd_rows = self._sd * np.exp(self._log_scale)[:, None]
            self._window[:] = 0
        if s == self._adapt_steps:
            self._freeze()

    def _freeze(self) -> None:
        scale = np.exp(self._log_scale)
        self._proposal = {
            "policy": "adapted",
            "adapt_steps": self._adapt_steps,
            "target_acceptance": self._target,
            "frozen_at_step": self._step,
            "scale": [float(v) for v in scale],
            "proposal_sd": [[float(v) for v in self._sd * f] for f in scale],
            "reason": (
                f"proposal scale tuned per chain over the first {self._adapt_steps:,} steps "
                f"towards acceptance {self._target:g} (Roberts, Gelman and Gilks 1997; "
                "Roberts and Rosenthal 2001), then frozen"
            ),
        }

    def steps(self, n: int) -> Iterator[StepRows]:
        """Advance ``n`` steps; see :class:`chainyard.engine.protocol.SamplerDriver`."""
        x, lp, model = self._x, self._lp, self._model
        n_blobs = model.n_blobs
        size = self._block
        for _ in range(n):
            i = self._step % size
            if i == 0:
                self._draw_block()
            prop = x + self._sd_rows * self._z[:, i]
            total = float(np.add.reduce(prop, axis=None))  # exact check only if not finite
            if not -np.inf < total < np.inf and not np.isfinite(prop).all():
                raise ModelError(
                    "the sampler proposed a non-finite position (a chain has diverged: check "
                    "the model for log-probabilities that grow without bound)"
                )
            out = model(prop)
            lp_new = out if out.ndim == 1 else out[:, 0]
            accepted = accepts(self._log_u[:, i], lp_new, lp)
            np.copyto(x, prop, where=accepted[:, None])
            np.copyto(lp, lp_new, where=accepted)
            if n_blobs:
                np.copyto(self._blobs, out[:, 1:], where=accepted[:, None])
            self._step += 1
            if self._step <= self._adapt_steps:
                self._adapt(accepted)
            yield StepRows(x, lp, accepted, self._blobs)

    def fill(self, block: StepBlock, a: int, b: int) -> None:
        """Take steps ``a .. b - 1`` into rows ``a .. b - 1`` of the run loop's buffer: the
        draws of :meth:`steps`, with each chain's state kept in the buffer's rows (the
        accept step writes the new row, no further copy)."""
        model, size, n_blobs = self._model, self._block, self._model.n_blobs
        call = model.checked
        position, log_prob, accepted, blobs = block
        prev, prev_lp = self._x, self._lp
        safe_until = a  # proposals of rows before this are known to be finite
        for k in range(a, b):
            i = self._step % size
            if i == 0:
                self._draw_block()
            prop = prev + self._sd_rows * self._z[:, i]
            if k >= safe_until:
                span = min(b - k, size - i)
                if self._step >= self._adapt_steps and self._finite_for(prev, span):
                    safe_until = k + span
                else:
                    total = float(np.add.reduce(prop, axis=None))  # exact check if not finite
                    if not -np.inf < total < np.inf and not np.isfinite(prop).all():
                        raise ModelError(
                            "the sampler proposed a non-finite position (a chain has diverged: "
                            "check the model for log-probabilities that grow without bound)"
                        )
            out = call(prop)
            lp_new = out if out.ndim == 1 else out[:, 0]
            acc = accepted[k]
            np.less(self._log_u[:, i], np.subtract(lp_new, prev_lp), out=acc)
            row, lp_row = position[k], log_prob[k]
            row[...] = prev
            np.copyto(row, prop, where=acc[:, None])
            lp_row[...] = prev_lp
            np.copyto(lp_row, lp_new, where=acc)
            if n_blobs:
                np.copyto(self._blobs, out[:, 1:], where=acc[:, None])
                blobs[:, k] = self._blobs.T
            self._step += 1
            if self._step <= self._adapt_steps:
                self._adapt(acc)
            prev, prev_lp = row, lp_row
        self._x[...] = prev
        self._lp[...] = prev_lp

    def random_state(self) -> dict[str, Any]:
        """Every chain's stream, the proposal scales and the frozen proposal, as JSON."""
        return {
            "sampler": "metropolis_hastings",
            "bit_generator": "PCG64",
            "block": self._block,
            # at a block boundary the streams' current states start the next block
            "chains": [generator_to_json(g) for g in self._gens]
            if self._step % self._block == 0
            else self._starts,
            "log_scale": [float(v) for v in self._log_scale],
            "window_accepted": [int(v) for v in self._window],
            "proposal": self._proposal
            or {
                "policy": "fixed" if self._adapt_steps == 0 else "adapting",
                "proposal_sd": [float(v) for v in self._sd],
                "reason": "proposal_sd as configured"
                if self._adapt_steps == 0
                else f"adaptation runs until step {self._adapt_steps:,}",
            },
        }


def _make_driver(
    config: RunConfig,
    model: LoadedModel,
    position: NDArray[np.float64],
    log_prob: NDArray[np.float64],
    blobs: NDArray[np.float64],
    random_state: dict[str, Any],
    step: int,
) -> MetropolisDriver:
    spec = config.sampler
    n_model = len(spec.blobs)
    return MetropolisDriver(model, spec, position, log_prob, blobs[:, :n_model], random_state, step)


KIND = register(
    SamplerKind(
        name="metropolis_hastings",
        identity=MetropolisDriver.kind,
        axis="chains",
        independent_draws=False,
        engine_blobs=(),
        initial_random_state=lambda config, replica: initial_metropolis_state(
            config.sampler, config.seed, replica
        ),
        make_driver=_make_driver,
        check_random_state=check_chain_states,
    )
)
