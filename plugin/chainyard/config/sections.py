"""Config sections of one run: model, parameters, sampler and moves, storage."""

from __future__ import annotations

import math
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    Discriminator,
    Field,
    Tag,
    field_validator,
    model_validator,
)

from chainyard.config._base import _Strict

#: names of parameters and blobs (also used as store array names)
NAME_PATTERN = r"^[A-Za-z_][A-Za-z0-9_.\-]*$"

# --------------------------------------------------------------------------- model


class ModelSpec(_Strict):
    """Where the log-probability function and its data come from."""

    log_prob: str = Field(
        description=(
            "The log-probability function, as 'path/to/module.py:function' (path relative to "
            "the config file) or 'package.module:function' (importable). Called as "
            "log_prob(theta, data); theta has shape (params,), or (walkers, params) when "
            "'vectorized' is true."
        ),
        examples=["model.py:log_prob"],
    )
    data: str | None = Field(
        default=None,
        description=(
            "Optional data file (.csv with a header row, .npz, .json), relative to the config "
            "file; loaded once and passed as the second argument. None: data is None. CSV: "
            "UTF-8 without BOM, unique column names, at least one row, every row as long as "
            "the header; a column with any number must be all finite numbers (no empty or "
            "n/a cells), a column with no numbers is passed as labels (str). NPZ: no object "
            "arrays. JSON: standard JSON (no NaN/Infinity). Rules: chainyard.datafiles."
        ),
    )
    data_loader: str | None = Field(
        default=None,
        description=(
            "Optional function 'module.py:function' or 'package.module:function' called as "
            "loader(path) to load 'data' instead of the built-in readers."
        ),
    )
    vectorized: bool = Field(
        default=False,
        description=(
            "True if log_prob takes all walkers at once: theta (walkers, params) -> (walkers,)."
        ),
    )
    extra_sources: tuple[str, ...] = Field(
        default=(),
        description=(
            "Further source files (relative to the config file) whose content is part of the "
            "model's identity, e.g. helper modules the model imports."
        ),
    )

    call_time_limit_seconds: float | None = Field(
        default=None,
        gt=0,
        description=(
            "Optional limit on the wall time of one call of log_prob (seconds). A call that "
            "takes longer stops the run with a model error naming the step and walker; the "
            "finished steps stay committed. None: no limit. Does not change the draws."
        ),
    )
    check_deterministic: bool = Field(
        default=True,
        description=(
            "At the first commit, evaluate log_prob again at a few stored positions and stop "
            "if the results differ bitwise (a model that draws random numbers or reads the "
            "clock cannot be resumed exactly). Does not change the draws."
        ),
    )

    @field_validator("log_prob", "data_loader")
    @classmethod
    def _function_reference(cls, value: str | None) -> str | None:
        return function_reference(value)


def function_reference(value: str | None) -> str | None:
    """Check a 'path/to/module.py:function' or 'package.module:function' reference."""
    if value is None:
        return value
    module, sep, func = value.rpartition(":")
    if not sep or not module or not func.isidentifier():
        raise ValueError("must look like 'path/to/module.py:function' or 'package.module:function'")
    return value


# --------------------------------------------------------------------------- parameters


class NormalSpec(_Strict):
    loc: float = Field(description="Centre of the normal ball (parameter units).")
    scale: float = Field(gt=0, description="Standard deviation of the ball (parameter units).")


class UniformSpec(_Strict):
    low: float = Field(description="Lower edge of the box (parameter units).")
    high: float = Field(description="Upper edge of the box (parameter units).")

    @model_validator(mode="after")
    def _ordered(self) -> UniformSpec:
        if not self.high > self.low:
            raise ValueError(f"high ({self.high}) must be greater than low ({self.low})")
        return self


class NormalInit(_Strict):
    """Walkers start at loc + scale * N(0, 1)."""

    normal: NormalSpec


class UniformInit(_Strict):
    """Walkers start uniformly in [low, high)."""

    uniform: UniformSpec


def _init_kind(value: Any) -> str | None:
    if isinstance(value, dict) and len(value) == 1:
        return next(iter(value))
    if isinstance(value, BaseModel):
        return next(iter(type(value).model_fields))
    return None


InitSpec = Annotated[
    Annotated[NormalInit, Tag("normal")] | Annotated[UniformInit, Tag("uniform")],
    Discriminator(
        _init_kind,
        custom_error_type="init_kind",
        custom_error_message="must be exactly one of {normal: {loc, scale}} or "
        "{uniform: {low, high}}",
    ),
]


#: a bound may be infinite (an open side, like null); NaN is refused by the validator
_Bound = Annotated[float, Field(allow_inf_nan=True)]


class Parameter(_Strict):
    """One model parameter, in the order theta holds them."""

    name: str = Field(pattern=NAME_PATTERN, description="Parameter name.")
    init: InitSpec | None = Field(
        default=None,
        description=(
            "How walkers are initialised for this parameter. Required unless the sampler's "
            "'initial_positions' file is given."
        ),
    )
    bounds: tuple[_Bound | None, _Bound | None] | None = Field(
        default=None,
        description=(
            "Optional [low, high] support (either may be null, or -inf/+inf, for an open "
            "side). Outside it log_prob is -inf and the model is not called."
        ),
    )
    unit: str | None = Field(default=None, description="Unit for labels in plots and tables.")
    label: str | None = Field(default=None, description="Longer human label for plots.")
    reference_value: float | None = Field(
        default=None,
        allow_inf_nan=False,
        description=(
            "Optional known or expected value (a simulation's truth, a previous estimate), "
            "drawn on traces and marginals; never used in sampling or diagnostics."
        ),
    )

    @field_validator("bounds")
    @classmethod
    def _bounds_ordered(
        cls, value: tuple[float | None, float | None] | None
    ) -> tuple[float | None, float | None] | None:
        if value is not None:
            low, high = value
            if any(b is not None and math.isnan(b) for b in value):
                raise ValueError("NaN is not a bound; use a number, or null for an open side")
            if low is not None and high is not None and not high > low:
                raise ValueError(f"high ({high}) must be greater than low ({low})")
        return value


# --------------------------------------------------------------------------- sampler


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


#: sampler kinds with their spec classes (the default kind first)
SAMPLER_KINDS: dict[str, type[_Strict]] = {
    "ensemble": SamplerSpec,
    "metropolis_hastings": MetropolisSpec,
    "kernel": KernelSpec,
    "accept_reject": AcceptRejectSpec,
}


#: kinds added by :func:`register_sampler_spec` (a sampler kind declared in a module of its own)
_REGISTERED_SPECS: dict[str, type[_Strict]] = {}
#: the union tag pydantic puts into error paths for a registered kind
REGISTERED_TAG = "registered"


def register_sampler_spec(spec: type[_Strict]) -> None:
    """Accept ``sampler.kind: NAME`` with settings ``spec`` (a kind of a module of its own).

    ``spec`` is a config section with a ``kind: Literal[NAME]`` field; chain samplers derive
    from :class:`ChainSamplerSpec`. The committed JSON Schema describes the built-in kinds.

    Raises
    ------
    ValueError
        If ``NAME`` is a built-in kind or already registered with another spec.
    """
    name = spec.model_fields["kind"].annotation.__args__[0]  # type: ignore[union-attr]
    held = SAMPLER_KINDS.get(name)
    if held is not None and held is not spec:
        raise ValueError(f"sampler kind {name!r} already has its settings")
    SAMPLER_KINDS[name] = spec
    _REGISTERED_SPECS[name] = spec


class _RegisteredSampler:
    """The union member of kinds registered at run time (validated by their own spec)."""

    @classmethod
    def __get_pydantic_core_schema__(cls, source: Any, handler: Any) -> Any:
        from pydantic_core import core_schema

        def validate(value: Any) -> Any:
            spec = _REGISTERED_SPECS[_sampler_kind(value) or ""]
            return value if isinstance(value, spec) else spec.model_validate(value)

        return core_schema.no_info_plain_validator_function(
            validate,
            serialization=core_schema.plain_serializer_function_ser_schema(
                lambda value, info: value.model_dump(mode=info.mode), info_arg=True
            ),
        )

    @classmethod
    def __get_pydantic_json_schema__(cls, schema: Any, handler: Any) -> dict[str, Any]:
        return {"not": {}}  # matches nothing: the schema file describes the built-in kinds


def _sampler_kind(value: Any) -> str | None:
    if isinstance(value, dict):
        kind = value.get("kind", "ensemble")
        return kind if isinstance(kind, str) else None
    return getattr(value, "kind", None)


def _sampler_tag(value: Any) -> str | None:
    kind = _sampler_kind(value)
    return REGISTERED_TAG if kind in _REGISTERED_SPECS else kind


AnySamplerSpec = Annotated[
    Annotated[SamplerSpec, Tag("ensemble")]
    | Annotated[MetropolisSpec, Tag("metropolis_hastings")]
    | Annotated[KernelSpec, Tag("kernel")]
    | Annotated[AcceptRejectSpec, Tag("accept_reject")]
    | Annotated[_RegisteredSampler, Tag(REGISTERED_TAG)],
    Discriminator(
        _sampler_tag,
        custom_error_type="sampler_kind",
        custom_error_message="must be one of ensemble (default), "
        "metropolis_hastings, kernel, accept_reject",
    ),
]

#: the public base of chain samplers' settings (for kinds declared in modules of their own)
ChainSamplerSpec = _ChainSampler


def sampler_keys(kind: str) -> list[str]:
    """The settings of one sampler kind: chains or walkers first, then its own settings."""
    cls = SAMPLER_KINDS[kind]
    shared = list(_ChainSampler.model_fields) if kind != "ensemble" else []
    own = [k for k in cls.model_fields if k not in shared and k != "kind"]
    first = ["chains"] if shared else []
    return first + own + [k for k in shared if k not in first]


# --------------------------------------------------------------------------- storage


class StorageSpec(_Strict):
    """How draws are stored and committed."""

    chunk_steps: int = Field(
        default=1000, ge=1, description="Steps per stored chunk (zarr chunk length)."
    )
    commit_every_steps: int = Field(
        default=2000, ge=1, description="Commit at least every this many steps."
    )
    commit_every_seconds: float = Field(
        default=30.0, gt=0, description="Commit at least every this many seconds (wall time)."
    )
    codec: Literal["pcodec", "zstd", "blosc_zstd", "lz4", "none"] = Field(
        default="pcodec",
        description=(
            "Lossless codec for the float arrays. pcodec stores about 30 bytes per 10-D draw "
            "(raw: 80); zstd about 32 and faster to write; none stores raw bytes."
        ),
    )
    level: int | None = Field(
        default=None,
        ge=0,
        le=22,
        description=(
            "Codec level; None: the codec's default. Allowed: pcodec 0-12, zstd 0-22, "
            "blosc_zstd and lz4 0-9; none takes no level."
        ),
    )
    fsync: bool = Field(
        default=True,
        description="Flush every commit to disk before it counts (survives power loss).",
    )
    commit_writer: Literal["auto", "process", "thread"] = Field(
        default="auto",
        description=(
            "Where commits are encoded and written while sampling goes on: 'process', a "
            "helper process (no contention with the sampler for Python's interpreter lock; "
            "Linux only); 'thread', a background thread; 'auto', the process on Linux for runs "
            "of at least 5,000 more steps, else the thread. The stored bytes are the same."
        ),
    )


#: highest level each codec accepts (None: the codec takes no level)
CODEC_MAX_LEVEL: dict[str, int | None] = {
    "pcodec": 12,
    "zstd": 22,
    "blosc_zstd": 9,
    "lz4": 9,
    "none": None,
}
