"""Config sections for the built-in samplers: the ensemble with its moves, Metropolis-Hastings,
user kernels and accept-reject with its envelope.

Which section a config's ``sampler.kind`` selects is :mod:`chainyard.config.sampler_kinds`.
"""

from __future__ import annotations

import math
from typing import Annotated, Any, Literal

from pydantic import (
    Discriminator,
    Field,
    Tag,
    field_validator,
)

from chainyard.config._base import _Strict
from chainyard.config.model import (
    NAME_PATTERN,
    NormalSpec,
    UniformSpec,
    _init_kind,
    function_reference,
)


class _Move(_Strict):
    weight: float = Field(default=1.0, gt=0, description="Relative probability of this move.")


class StretchMove(_Move):
    """Affine-invariant stretch move (Goodman and Weare 2010)."""

    kind: Literal["stretch"]
    scale: float = Field(default=2.0, gt=1, description="Stretch scale a (> 1).")


class WalkMove(_Move):
    """Affine-invariant walk move (Goodman and Weare 2010)."""

    kind: Literal["walk"]
    subset_size: int | None = Field(
        default=None, ge=2, description="Walkers in the complementary subset; None: all."
    )


class DifferentialEvolutionMove(_Move):
    """Differential-evolution proposal (ter Braak 2006; Nelson et al. 2014)."""

    kind: Literal["differential_evolution"]
    jitter: float = Field(default=1e-5, ge=0, description="Scale of the Gaussian jitter.")
    step_factor: float | None = Field(
        default=None, gt=0, description="Mean step factor gamma0; None: 2.38/sqrt(2*params)."
    )


class DESnookerMove(_Move):
    """Differential-evolution snooker update (ter Braak and Vrugt 2008)."""

    kind: Literal["de_snooker"]
    step_factor: float = Field(default=1.7, gt=0, description="Snooker step factor gamma.")


class GaussianMove(_Move):
    """Gaussian random-walk Metropolis-Hastings proposal per walker."""

    kind: Literal["gaussian"]
    proposal_sd: float | tuple[float, ...] = Field(
        description="Proposal standard deviation: one value, or one per parameter."
    )
    update: Literal["vector", "random", "sequential"] = Field(
        default="vector",
        description="Update all coordinates at once, one random coordinate, or cycle.",
    )

    @field_validator("proposal_sd", mode="before")
    @classmethod
    def _positive_sd(cls, value: Any) -> Any:
        return _check_sd(value)


MoveSpec = Annotated[
    StretchMove | WalkMove | DifferentialEvolutionMove | DESnookerMove | GaussianMove,
    Field(discriminator="kind"),
]


class SamplerSpec(_Strict):
    """The ensemble sampler (kind ``ensemble``, the default when ``kind`` is absent)."""

    kind: Literal["ensemble"] = Field(
        default="ensemble",
        exclude=True,  # the default kind is left out of the normalised config (stable hashes)
        description="Sampler kind; 'ensemble' (the default) is emcee's ensemble of walkers.",
    )
    walkers: int = Field(ge=2, description="Number of walkers (at least 2 x parameters).")
    steps: int = Field(ge=1, description="Total number of steps in the finished run.")
    moves: tuple[MoveSpec, ...] = Field(
        default=(StretchMove(kind="stretch"),),
        description="Proposal moves with weights. Default: one stretch move with scale 2.",
    )
    blobs: tuple[Annotated[str, Field(pattern=NAME_PATTERN)], ...] = Field(
        default=(),
        description=(
            "Names of extra scalar values log_prob returns after the log-probability, "
            "stored per step and walker."
        ),
    )
    initial_positions: str | None = Field(
        default=None,
        description=(
            "Optional .npy or .csv file of shape (walkers, params) with every walker's start; "
            "overrides the parameters' 'init'."
        ),
    )
    init_retries: int = Field(
        default=100,
        ge=0,
        description=(
            "Times a walker whose start has log_prob -inf is redrawn from its 'init' before "
            "the run is refused."
        ),
    )


def _check_sd(value: Any) -> Any:
    values = list(value) if isinstance(value, list | tuple) else [value]
    ok = bool(values) and all(
        isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v) and v > 0
        for v in values
    )
    if not ok:
        raise ValueError("must be a positive finite number, or a list of them (one per parameter)")
    return value


class _ChainSampler(_Strict):
    """Settings shared by the samplers of independent chains.

    The store's walkers axis holds the chains: ``walkers`` is an alias of ``chains`` so that
    the store, diagnostics and workflow code read every kind alike.
    """

    chains: int = Field(
        default=4, ge=1, description="Independent chains, each with its own random stream."
    )
    initial_positions: str | None = Field(
        default=None,
        description=(
            "Optional .npy or .csv file of shape (chains, params) with every chain's start; "
            "overrides the parameters' 'init'."
        ),
    )
    init_retries: int = Field(
        default=100,
        ge=0,
        description="Times a chain whose start has log_prob -inf is redrawn from its 'init'.",
    )

    @property
    def walkers(self) -> int:
        """The store's walkers axis: one entry per chain."""
        return self.chains

    @property
    def moves(self) -> tuple[MoveSpec, ...]:
        """No ensemble moves (an empty tuple, so ensemble-only code paths skip them)."""
        return ()


class MetropolisSpec(_ChainSampler):
    """Random-walk Metropolis-Hastings: independent chains with Gaussian proposals."""

    kind: Literal["metropolis_hastings"]
    steps: int = Field(ge=1, description="Total number of steps per chain in the finished run.")
    proposal_sd: float | tuple[float, ...] = Field(
        description=(
            "Standard deviation of the Gaussian random-walk proposal (parameter units): one "
            "value for every parameter, or one per parameter."
        )
    )
    adapt_steps: int = Field(
        default=0,
        ge=0,
        description=(
            "Length of the adaptation phase (steps). During it each chain's proposal scale is "
            "tuned towards 'target_acceptance'; it is frozen afterwards and recorded. 0: no "
            "adaptation. Steps of the phase are stored; burn-in should discard them."
        ),
    )
    target_acceptance: float | None = Field(
        default=None,
        gt=0,
        lt=1,
        description=(
            "Acceptance rate the adaptation aims at. None: 0.44 for one parameter, 0.234 for "
            "more (Roberts, Gelman and Gilks 1997; Roberts and Rosenthal 2001)."
        ),
    )
    blobs: tuple[Annotated[str, Field(pattern=NAME_PATTERN)], ...] = Field(
        default=(),
        description="Names of extra scalar values log_prob returns, stored per step and chain.",
    )

    @field_validator("proposal_sd", mode="before")
    @classmethod
    def _positive_sd(cls, value: Any) -> Any:
        return _check_sd(value)


class KernelSpec(_ChainSampler):
    """A user-written transition kernel (e.g. a Gibbs sweep) run on independent chains."""

    kind: Literal["kernel"]
    kernel: str = Field(
        description=(
            "The kernel, 'path/to/module.py:function' (relative to the config file) or "
            "'package.module:function'. Called as step(state, rng, data) with state the "
            "parameter vector (params,) and rng the chain's own numpy Generator; returns the "
            "new state, or (state, log_prob). All randomness must come from rng."
        ),
        examples=["gibbs.py:sweep"],
    )
    steps: int = Field(ge=1, description="Total number of steps per chain in the finished run.")
    check_rng: bool = Field(
        default=True,
        description=(
            "At the first commit of a run, rerun the first steps of chain 0 from the recorded "
            "state and random state and stop if they differ bitwise (a kernel drawing from "
            "another source of randomness cannot be resumed exactly)."
        ),
    )

    @field_validator("kernel")
    @classmethod
    def _function_reference(cls, value: str) -> str | None:
        return function_reference(value)

    @property
    def blobs(self) -> tuple[str, ...]:
        """No blobs for kernels."""
        return ()


class NormalEnvelope(_Strict):
    """Envelope density g for one parameter: a normal distribution."""

    normal: NormalSpec


class UniformEnvelope(_Strict):
    """Envelope density g for one parameter: a uniform distribution on [low, high)."""

    uniform: UniformSpec


EnvelopeSpec = Annotated[
    Annotated[NormalEnvelope, Tag("normal")] | Annotated[UniformEnvelope, Tag("uniform")],
    Discriminator(
        _init_kind,
        custom_error_type="envelope_kind",
        custom_error_message="must be exactly one of {normal: {loc, scale}} or "
        "{uniform: {low, high}}",
    ),
]


def _envelope_form(value: Any) -> str | None:
    """``one`` for a single envelope entry, ``list`` for one entry per parameter."""
    if isinstance(value, (list, tuple)):
        return "list"
    if isinstance(value, (dict, NormalEnvelope, UniformEnvelope)):
        return "one"
    return None


#: one entry (one parameter) or a list of entries; discriminated so that a mistake is reported
#: once, inside the form given, not once per form pydantic tried
EnvelopeField = Annotated[
    Annotated[EnvelopeSpec, Tag("one")] | Annotated[tuple[EnvelopeSpec, ...], Tag("list")],
    Discriminator(
        _envelope_form,
        custom_error_type="envelope_form",
        custom_error_message="must be one {normal: {loc, scale}} or {uniform: {low, high}} "
        "mapping, or a list of them (one per parameter)",
    ),
]


class AcceptRejectSpec(_ChainSampler):
    """Accept-reject sampling: exact independent draws under an envelope M g(x) >= f(x)."""

    kind: Literal["accept_reject"]
    envelope: EnvelopeField = Field(
        description=(
            "The envelope density g, a product of one distribution per parameter (normal or "
            "uniform): a single mapping when there is one parameter, else a list in theta "
            "order."
        )
    )
    log_bound: float = Field(
        description="log M, with log f(x) <= log M + log g(x) everywhere (f: the model)."
    )
    draws: int = Field(ge=1, description="Accepted draws per chain in the finished run.")

    @property
    def steps(self) -> int:
        """The store's steps axis: one accepted draw per step."""
        return self.draws

    @property
    def envelopes(self) -> tuple[NormalEnvelope | UniformEnvelope, ...]:
        """The envelope as one entry per parameter."""
        return self.envelope if isinstance(self.envelope, tuple) else (self.envelope,)

    @property
    def blobs(self) -> tuple[str, ...]:
        """No model blobs (the proposal counts are stored by the engine)."""
        return ()
