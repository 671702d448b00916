"""Accept-reject sampling: exact, independent draws under an envelope (von Neumann 1951).

A proposal ``x ~ g`` (a product of one normal or uniform per parameter) is accepted when
``log u < log f(x) - log M - log g(x)`` with ``u ~ U(0, 1]``; accepted proposals are
independent draws from ``f`` if ``f(x) <= M g(x)`` everywhere, and for a normalised ``f``
the acceptance rate is ``1 / M`` (Robert and Casella 2004, section 2.3). A proposal with
``log f(x) > log M + log g(x)`` (beyond a rounding tolerance ``ENVELOPE_TOLERANCE``) proves
the envelope invalid and stops the run, naming x.

Each chain draws proposals from its own stream in blocks of ``BLOCK`` (all ``BLOCK x params``
envelope values, then ``BLOCK`` uniforms) and evaluates the model once per block. Step ``k``
of a chain stores its ``k``-th accepted proposal and, as the engine's blob
``proposals_per_draw``, how many proposals it took (the accepted one included). The record
of a chain is its stream state at the start of the current block plus the number of the
block's proposals already used; resume regenerates that block, so the draws do not depend on
where commits fell.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.config import AcceptRejectSpec, NormalEnvelope, RunConfig
from chainyard.engine.chains import (
    check_chain_states,
    fresh_chain_states,
    generator_from_json,
    generator_to_json,
)
from chainyard.engine.protocol import StepRows
from chainyard.engine.registry import SamplerKind, register
from chainyard.errors import ConfigError
from chainyard.model import LoadedModel

__all__ = [
    "BLOCK",
    "ENVELOPE_TOLERANCE",
    "KIND",
    "MAX_PROPOSALS_PER_DRAW",
    "PROPOSALS_BLOB",
    "AcceptRejectDriver",
    "Envelope",
    "initial_accept_reject_state",
]

#: proposals drawn and evaluated together per chain
BLOCK = 1024
#: rounding allowance (in log units) before log f > log M + log g counts as a violation
ENVELOPE_TOLERANCE = 1e-9
#: proposals one chain may take for one draw before the run stops: an observed acceptance
#: below 1 / this makes the requested draws out of reach (log M far above max log f/g)
MAX_PROPOSALS_PER_DRAW = 1_000_000
#: name of the engine's per-draw blob holding the proposals each accepted draw took
PROPOSALS_BLOB = "proposals_per_draw"

_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)


class Envelope:
    """The product envelope density g: draws and log-density.

    Parameters
    ----------
    spec : AcceptRejectSpec
        One normal or uniform per parameter.
    """

    def __init__(self, spec: AcceptRejectSpec) -> None:
        entries = spec.envelopes
        self.normal = np.array([isinstance(e, NormalEnvelope) for e in entries])
        self.a = np.array(
            [e.normal.loc if isinstance(e, NormalEnvelope) else e.uniform.low for e in entries]
        )
        self.b = np.array(
            [e.normal.scale if isinstance(e, NormalEnvelope) else e.uniform.high for e in entries]
        )
        self._all_normal = bool(self.normal.all())
        if self._all_normal:  # the constant terms of log g, as log_density computes them
            self._log_b = float(np.sum(np.log(self.b)))
            self._log_2pi_terms = self.a.size * (_HALF_LOG_2PI)
        # one location and one scale for every parameter: the arithmetic takes them as
        # scalars (each element's operation, and so its value, is the same)
        same = self._all_normal and bool(
            np.all(self.a == self.a[0]) and np.all(self.b == self.b[0])
        )
        self._loc: Any = float(self.a[0]) if same else self.a
        self._scale: Any = float(self.b[0]) if same else self.b

    def draw(self, gen: np.random.Generator, n: int) -> NDArray[np.float64]:
        """``n`` proposals, shape (n, params). From the stream: an (n, params) block of
        standard normals if any entry is normal, then an (n, params) block of uniforms if any
        entry is uniform (each column uses its own kind's block)."""
        p = self.a.size
        if self._all_normal:  # the same values without the per-kind selection
            return self._loc + self._scale * gen.standard_normal((n, p))
        out = np.empty((n, p))
        if self.normal.any():
            z = gen.standard_normal((n, p))
            np.copyto(out, self.a + self.b * z, where=self.normal)
        if not self.normal.all():
            u = gen.random((n, p))
            np.copyto(out, self.a + (self.b - self.a) * u, where=~self.normal)
        return out

    def log_density(self, x: NDArray[np.float64]) -> NDArray[np.float64]:
        """log g(x) for rows x, shape (n, params) -> (n,)."""
        if self._all_normal:  # the same terms in the same order as below
            z = (x - self._loc) / self._scale
            return np.sum(-0.5 * z * z, axis=1) - self._log_b - self._log_2pi_terms
        total = np.zeros(x.shape[0])
        if self.normal.any():
            a, b = self.a[self.normal], self.b[self.normal]
            z = (x[:, self.normal] - a) / b
            total += (
                np.sum(-0.5 * z * z, axis=1) - float(np.sum(np.log(b))) - a.size * (_HALF_LOG_2PI)
            )
        if not self.normal.all():
            low, high = self.a[~self.normal], self.b[~self.normal]
            xs = x[:, ~self.normal]
            inside = np.all((xs >= low) & (xs < high), axis=1)
            total += np.where(inside, -float(np.sum(np.log(high - low))), -np.inf)
        return total


def initial_accept_reject_state(spec: AcceptRejectSpec, seed: int, replica: int) -> dict[str, Any]:
    """The driver record before the first draw (fresh streams, no block yet)."""
    return {
        "sampler": "accept_reject",
        "bit_generator": "PCG64",
        "block": BLOCK,
        "chains": [
            {"block_start": start, "used": None}
            for start in fresh_chain_states(seed, replica, spec.chains)
        ],
    }


class _Block:
    """One chain's current block of evaluated proposals."""

    __slots__ = ("accept", "lf", "start", "used", "x")

    def __init__(
        self,
        start: dict[str, Any],
        x: NDArray[np.float64],
        lf: NDArray[np.float64],
        accept: NDArray[np.bool_],
        used: int,
    ) -> None:
        self.start, self.x, self.lf, self.accept, self.used = start, x, lf, accept, used


class AcceptRejectDriver:
    """Independent accept-reject draws on every chain.

    Parameters
    ----------
    model : LoadedModel
        The guarded evaluator of log f.
    spec : AcceptRejectSpec
        Envelope, log M, chains.
    random_state : dict
        The driver record (:func:`initial_accept_reject_state` or a commit's).
    chains : int
        Number of chains.
    """

    kind = "chainyard.accept_reject"

    def __init__(
        self,
        model: LoadedModel,
        spec: AcceptRejectSpec,
        random_state: dict[str, Any],
        chains: int,
    ) -> None:
        self._model = model
        self._env = Envelope(spec)
        self._log_m = float(spec.log_bound)
        records = random_state.get("chains")
        self._size = int(random_state.get("block", BLOCK))
        if not isinstance(records, list) or len(records) != chains or self._size < 1:
            raise ValueError(f"malformed accept-reject state: expected {chains} chain records")
        self._gens: list[np.random.Generator] = []
        self._blocks: list[_Block | None] = []
        for rec in records:
            gen = generator_from_json(rec["block_start"])
            self._gens.append(gen)
            used = rec.get("used")
            # a block in progress is drawn again from its recorded start (same bits)
            self._blocks.append(None if used is None else self._new_block(gen, int(used)))
        #: draws and proposals of this session (the proposals' acceptance for progress lines)
        self._drawn = 0
        self._proposed = 0

    @property
    def progress_acceptance(self) -> float:
        """Accepted draws / proposals this session (what the user tunes log M by)."""
        return self._drawn / self._proposed if self._proposed else float("nan")

    def _out_of_reach(self, chain: int, taken: int) -> ConfigError:
        return ConfigError(
            f"sampler.log_bound = {self._log_m:g}: chain {chain} had no proposal accepted in "
            f"{taken:,} (acceptance below {1 / MAX_PROPOSALS_PER_DRAW:g}), so the draws asked "
            "for are out of reach; lower log_bound (log M) towards the largest log f(x) - "
            "log g(x), or move the envelope closer to the model"
        )

    def _new_block(self, gen: np.random.Generator, used: int = 0) -> _Block:
        start = generator_to_json(gen)
        x = self._env.draw(gen, self._size)
        log_u = np.log1p(-gen.random(self._size))
        out = self._model.checked(x)
        lf = out if out.ndim == 1 else out[:, 0]
        lg = self._env.log_density(x)
        excess = lf - (self._log_m + lg)
        bad = np.flatnonzero(excess > ENVELOPE_TOLERANCE)
        if bad.size:
            i = int(bad[0])
            theta = ", ".join(
                f"{n}={v:.6g}" for n, v in zip(self._model.param_names, x[i], strict=True)
            )
            raise ConfigError(
                f"sampler.envelope: invalid at x = ({theta}): log f(x) = {lf[i]:.6g} exceeds "
                f"log_bound + log g(x) = {self._log_m + lg[i]:.6g}; the draws would be wrong "
                "(raise log_bound or widen the envelope)"
            )
        accept = log_u < lf - self._log_m - lg
        return _Block(start, x, np.asarray(lf, dtype=np.float64), accept, used)

    def steps(self, n: int) -> Iterator[StepRows]:
        """Advance ``n`` draws per chain; see :class:`chainyard.engine.protocol.SamplerDriver`."""
        chains = len(self._gens)
        n_params = self._env.a.size
        x = np.empty((chains, n_params))
        lp = np.empty(chains)
        counts = np.empty((chains, 1))
        accepted = np.ones(chains, dtype=bool)
        for _ in range(n):
            for c in range(chains):
                taken = 0
                while True:
                    block = self._blocks[c]
                    if block is None or block.used >= self._size:
                        block = self._blocks[c] = self._new_block(self._gens[c])
                    hits = np.flatnonzero(block.accept[block.used :])
                    if hits.size:
                        j = block.used + int(hits[0])
                        taken += j + 1 - block.used
                        block.used = j + 1
                        break
                    taken += self._size - block.used
                    block.used = self._size
                    if taken >= MAX_PROPOSALS_PER_DRAW:
                        raise self._out_of_reach(c, taken)
                x[c], lp[c], counts[c, 0] = block.x[j], block.lf[j], taken
                self._proposed += taken
            self._drawn += chains
            yield StepRows(x, lp, accepted, counts)

    def random_state(self) -> dict[str, Any]:
        """Every chain's block start and use, as JSON (see module docstring)."""
        chains = []
        for gen, block in zip(self._gens, self._blocks, strict=True):
            if block is None:
                chains.append({"block_start": generator_to_json(gen), "used": None})
            else:
                chains.append({"block_start": block.start, "used": int(block.used)})
        return {
            "sampler": "accept_reject",
            "bit_generator": "PCG64",
            "block": self._size,
            "chains": chains,
        }


def _make_driver(
    config: RunConfig,
    model: LoadedModel,
    position: NDArray[np.float64],
    log_prob: NDArray[np.float64],
    blobs: NDArray[np.float64],
    random_state: dict[str, Any],
    step: int,
) -> AcceptRejectDriver:
    return AcceptRejectDriver(model, config.sampler, random_state, position.shape[0])


KIND = register(
    SamplerKind(
        name="accept_reject",
        identity=AcceptRejectDriver.kind,
        axis="chains",
        independent_draws=True,
        engine_blobs=(PROPOSALS_BLOB,),
        initial_random_state=lambda config, replica: initial_accept_reject_state(
            config.sampler, config.seed, replica
        ),
        make_driver=_make_driver,
        check_random_state=check_chain_states,
    )
)
