"""Run configuration: pydantic models, YAML loading, JSON Schema export.

A run configuration describes one sampling run: the model (log-probability function and
optional data), the ordered parameters with their initialisation, the sampler settings, how the
draws are stored, the seed, and optionally the diagnostic targets. Unknown keys are errors.
Every optional field has a documented default; see ``chainyard schema`` for the full schema.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Annotated, Any, Literal

import yaml
from pydantic import (
    BaseModel,
    ConfigDict,
    Discriminator,
    Field,
    PrivateAttr,
    Tag,
    ValidationError,
    field_validator,
    model_validator,
)

from chainyard.errors import ConfigError

__all__ = [
    "JSON_SCHEMA_DIALECT",
    "ModelSpec",
    "MoveSpec",
    "Parameter",
    "RunConfig",
    "SamplerSpec",
    "StorageSpec",
    "TargetsSpec",
    "config_hash",
    "format_validation_error",
    "json_schema",
    "load_config",
    "parse_config",
]

JSON_SCHEMA_DIALECT = "https://json-schema.org/draft/2020-12/schema"


class _Strict(BaseModel):
    """Base for every config section: unknown keys are errors, values are immutable."""

    model_config = ConfigDict(extra="forbid", frozen=True)


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
            "file; loaded once and passed as the second argument. None: data is None."
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

    @field_validator("log_prob", "data_loader")
    @classmethod
    def _function_reference(cls, value: str | None) -> str | None:
        if value is None:
            return value
        module, sep, func = value.rpartition(":")
        if not sep or not module or not func.isidentifier():
            raise ValueError(
                "must look like 'path/to/module.py:function' or 'package.module:function'"
            )
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


class Parameter(_Strict):
    """One model parameter, in the order theta holds them."""

    name: str = Field(pattern=r"^[A-Za-z_][A-Za-z0-9_.\-]*$", description="Parameter name.")
    init: InitSpec | None = Field(
        default=None,
        description=(
            "How walkers are initialised for this parameter. Required unless the sampler's "
            "'initial_positions' file is given."
        ),
    )
    bounds: tuple[float | None, float | None] | None = Field(
        default=None,
        description=(
            "Optional [low, high] support (either may be null). Outside it log_prob is -inf "
            "and the model is not called."
        ),
    )
    unit: str | None = Field(default=None, description="Unit for labels in plots and tables.")
    label: str | None = Field(default=None, description="Longer human label for plots.")

    @field_validator("bounds")
    @classmethod
    def _bounds_ordered(
        cls, value: tuple[float | None, float | None] | None
    ) -> tuple[float | None, float | None] | None:
        if value is not None:
            low, high = value
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


MoveSpec = Annotated[
    StretchMove | WalkMove | DifferentialEvolutionMove | DESnookerMove | GaussianMove,
    Field(discriminator="kind"),
]


class SamplerSpec(_Strict):
    """The ensemble sampler."""

    walkers: int = Field(ge=2, description="Number of walkers (at least 2 x parameters).")
    steps: int = Field(ge=1, description="Total number of steps in the finished run.")
    moves: tuple[MoveSpec, ...] = Field(
        default=(StretchMove(kind="stretch"),),
        description="Proposal moves with weights. Default: one stretch move with scale 2.",
    )
    blobs: tuple[str, ...] = Field(
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
    level: int | None = Field(default=None, ge=0, le=22, description="Codec level; None: default.")
    fsync: bool = Field(
        default=True,
        description="Flush every commit to disk before it counts (survives power loss).",
    )


# --------------------------------------------------------------------------- targets


class TargetsSpec(_Strict):
    """Convergence targets the diagnose step checks (defaults: Vehtari et al. 2021)."""

    max_rhat: float = Field(default=1.01, gt=1, description="Largest acceptable R-hat.")
    min_ess_bulk: float = Field(default=400, gt=0, description="Smallest bulk ESS.")
    min_ess_tail: float = Field(default=400, gt=0, description="Smallest tail ESS.")
    min_steps_per_tau: float = Field(
        default=50, gt=0, description="Smallest steps / autocorrelation time."
    )
    relative_precision: float | None = Field(
        default=None,
        gt=0,
        lt=1,
        description="If set, multivariate ESS must reach the minimum for this precision.",
    )


# --------------------------------------------------------------------------- decisions


class DefaultBurnIn(_Strict):
    """Larger of the MSER-5 cut on the log-prob trace and ``multiple`` x max tau (capped)."""

    policy: Literal["default"]
    multiple: float = Field(default=2.0, gt=0, description="Multiple of the largest tau.")
    max_fraction: float = Field(
        default=0.5, gt=0, lt=1, description="Largest fraction of the run to discard."
    )


class FixedBurnIn(_Strict):
    """Discard a fixed number of steps."""

    policy: Literal["fixed"]
    steps: int = Field(ge=0, description="Steps to discard.")


class FractionBurnIn(_Strict):
    """Discard a fraction of the run."""

    policy: Literal["fraction"]
    fraction: float = Field(ge=0, lt=1, description="Fraction of the steps to discard.")


class TauBurnIn(_Strict):
    """Discard a multiple of the largest autocorrelation time."""

    policy: Literal["tau_multiple"]
    multiple: float = Field(default=5.0, gt=0, description="Multiple of the largest tau.")


class MserBurnIn(_Strict):
    """MSER truncation (White 1997) on the walker-mean log-prob trace."""

    policy: Literal["mser"]
    batch_size: int = Field(default=5, ge=1, description="MSER batch length (5: MSER-5).")
    max_fraction: float = Field(default=0.5, gt=0, lt=1, description="Largest cut fraction.")


class GewekeBurnIn(_Strict):
    """First candidate cut whose Geweke (1992) z-score is within ``z_crit``."""

    policy: Literal["geweke"]
    z_crit: float = Field(default=1.96, gt=0, description="Critical |z|.")
    max_fraction: float = Field(default=0.5, gt=0, lt=1, description="Largest cut fraction.")


BurnInSpec = Annotated[
    DefaultBurnIn | FixedBurnIn | FractionBurnIn | TauBurnIn | MserBurnIn | GewekeBurnIn,
    Field(discriminator="policy"),
]


class NoThinning(_Strict):
    """Keep every step (default; Link and Eaton 2012)."""

    policy: Literal["none"]


class FixedThinning(_Strict):
    """Keep every ``factor``-th step."""

    policy: Literal["fixed"]
    factor: int = Field(ge=1, description="Keep every factor-th step.")


class TauThinning(_Strict):
    """Keep about every ``fraction`` x tau-th step."""

    policy: Literal["tau"]
    fraction: float = Field(default=0.5, gt=0, description="Factor = fraction x max tau.")


class TargetThinning(_Strict):
    """Thin to about ``draws`` stored draws per replica."""

    policy: Literal["target_draws"]
    draws: int = Field(ge=1, description="Draws (steps x walkers) to keep per replica.")


class CostAwareThinning(_Strict):
    """Owen (2017): the factor maximising efficiency when using a draw costs ``cost_ratio``."""

    policy: Literal["cost_aware"]
    cost_ratio: float = Field(gt=0, description="Cost of using a draw / cost of making one.")


ThinningSpec = Annotated[
    NoThinning | FixedThinning | TauThinning | TargetThinning | CostAwareThinning,
    Field(discriminator="policy"),
]


class ExtendSpec(_Strict):
    """Run until targets: extend chunk by chunk until the per-replica targets hold."""

    check_every: int = Field(default=2000, ge=1, description="Steps between checks.")
    max_steps: int = Field(ge=1, description="Never run past this many steps.")
    max_seconds: float | None = Field(
        default=None, gt=0, description="Stop extending after this much wall time."
    )


# --------------------------------------------------------------------------- run


class RunConfig(_Strict):
    """One sampling run."""

    model: ModelSpec
    parameters: tuple[Parameter, ...] = Field(description="Parameters in theta order.")
    sampler: SamplerSpec
    storage: StorageSpec = Field(default_factory=StorageSpec)
    seed: int = Field(ge=0, description="Root seed; replicas get independent spawned streams.")
    replicas: int = Field(default=1, ge=1, description="Independent replicas (for workflows).")
    targets: TargetsSpec = Field(default_factory=TargetsSpec)
    burn_in: BurnInSpec = Field(
        default_factory=lambda: DefaultBurnIn(policy="default"),
        description="How many initial steps to discard (default: MSER-5 and 2 x tau).",
    )
    thinning: ThinningSpec = Field(
        default_factory=lambda: NoThinning(policy="none"),
        description="Whether to keep only every k-th step (default: keep all).",
    )
    extend_until_targets: ExtendSpec | None = Field(
        default=None,
        description=(
            "If set, `sample --until-targets` extends the run until the per-replica targets "
            "(ESS, steps per tau) hold or the budget is spent."
        ),
    )
    description: str | None = Field(default=None, description="Free text for reports.")

    _base_dir: Path = PrivateAttr(default_factory=Path.cwd)
    _source: str = PrivateAttr(default="<config>")

    @model_validator(mode="after")
    def _consistent(self) -> RunConfig:
        if not self.parameters:
            raise ValueError("parameters: at least one parameter is required")
        if not self.sampler.moves:
            raise ValueError("sampler.moves: at least one move is required")
        names = [p.name for p in self.parameters]
        dupes = sorted({n for n in names if names.count(n) > 1})
        if dupes:
            raise ValueError(f"parameter names must be unique; repeated: {', '.join(dupes)}")
        n = len(names)
        if self.sampler.walkers < 2 * n:
            raise ValueError(
                f"sampler.walkers = {self.sampler.walkers}: must be at least 2 x parameters "
                f"= {2 * n}"
            )
        if self.sampler.initial_positions is None:
            missing = [p.name for p in self.parameters if p.init is None]
            if missing:
                raise ValueError(
                    "parameters without 'init' (and no sampler.initial_positions file): "
                    + ", ".join(missing)
                )
        blob_dupes = sorted({b for b in self.sampler.blobs if self.sampler.blobs.count(b) > 1})
        if blob_dupes:
            raise ValueError(f"sampler.blobs must be unique; repeated: {', '.join(blob_dupes)}")
        for i, move in enumerate(self.sampler.moves):
            sd = move.proposal_sd if isinstance(move, GaussianMove) else None
            if isinstance(sd, tuple) and len(sd) != n:
                raise ValueError(
                    f"sampler.moves[{i}].proposal_sd has {len(sd)} values; "
                    f"need 1 or {n} (one per parameter)"
                )
        return self

    # ------------------------------------------------------------------ helpers
    @property
    def base_dir(self) -> Path:
        """Directory that relative paths in this config are resolved against."""
        return self._base_dir

    @property
    def source(self) -> str:
        """Where this config was read from (for messages)."""
        return self._source

    @property
    def param_names(self) -> tuple[str, ...]:
        """Parameter names in theta order."""
        return tuple(p.name for p in self.parameters)

    def resolve(self, path: str) -> Path:
        """Resolve a path written in the config against the config's directory."""
        p = Path(path)
        return p if p.is_absolute() else (self._base_dir / p)

    def normalised(self) -> dict[str, Any]:
        """All settings with defaults filled in, as plain JSON-compatible values."""
        return json.loads(json.dumps(self.model_dump(mode="json"), sort_keys=True))

    def sampling_settings(self) -> dict[str, Any]:
        """The normalised settings the draws depend on (for workflow rerun triggers).

        Everything except decisions, targets, free text and the replica count: changing
        burn-in or thinning must not resample, and adding replicas must not resample the
        existing ones.
        """
        norm = self.normalised()
        for key in ("burn_in", "thinning", "targets", "description", "extend_until_targets",
                    "replicas"):
            norm.pop(key, None)
        return norm

    def with_steps(self, steps: int) -> RunConfig:
        """A copy with a different total step count (same base directory)."""
        data = self.model_dump()
        data["sampler"]["steps"] = steps
        return parse_config(data, base_dir=self._base_dir, source=self._source)


def config_hash(settings: dict[str, Any]) -> str:
    """SHA-256 of the canonical JSON (sorted keys, no spaces) of ``settings``."""
    blob = json.dumps(settings, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(blob.encode()).hexdigest()


def format_validation_error(error: ValidationError, source: str) -> list[str]:
    """Turn a pydantic error into one line per problem: file, field path, value, what is allowed.

    Parameters
    ----------
    error : ValidationError
        The error pydantic raised.
    source : str
        The config file's name, prefixed to every line.
    """
    lines = []
    for item in error.errors(include_url=False):
        loc = _clean_loc(item["loc"], item["type"])
        where = f"{source}: {loc}" if loc else source
        kind = item["type"]
        msg = item["msg"]
        if msg.startswith("Value error, "):
            msg = msg[len("Value error, ") :]
        if kind == "extra_forbidden":
            lines.append(f"{where}: unknown key (check the spelling; see `chainyard schema`)")
        elif kind == "missing":
            lines.append(f"{where}: required key is missing")
        else:
            value = item.get("input")
            shown = _short(value)
            lines.append(f"{where} = {shown}: {msg}" if loc else f"{where}: {msg}")
    return lines


def _clean_loc(loc: tuple[int | str, ...], kind: str) -> str:
    parts: list[str] = []
    for part in loc:
        if isinstance(part, int):
            parts.append(f"[{part}]")
        else:
            parts.append(f".{part}")
    text = "".join(parts).lstrip(".")
    # pydantic puts the union tag into the path for tagged unions: drop the repeat
    for tag in ("stretch", "walk", "differential_evolution", "de_snooker", "gaussian"):
        text = text.replace(f".{tag}.", ".").removesuffix(f".{tag}") if ".moves[" in text else text
    for tag in ("normal", "uniform"):
        text = text.replace(f".init.{tag}.{tag}", f".init.{tag}")
    return text


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def parse_config(data: Any, *, base_dir: Path | None = None, source: str = "<config>") -> RunConfig:
    """Validate a mapping as a :class:`RunConfig`.

    Raises
    ------
    ConfigError
        With one line per problem.
    """
    if not isinstance(data, dict):
        raise ConfigError(f"{source}: must be a mapping of settings, got {type(data).__name__}")
    try:
        config = RunConfig.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(format_validation_error(exc, source)) from None
    config._base_dir = (base_dir or Path.cwd()).resolve()
    config._source = source
    return config


def load_config(path: str | Path) -> RunConfig:
    """Read and validate a YAML (or JSON) run configuration.

    Parameters
    ----------
    path : str or Path
        The config file. Relative paths inside it are resolved against its directory.

    Raises
    ------
    ConfigError
        If the file cannot be read or any setting is invalid.
    """
    path = Path(path)
    try:
        text = path.read_text()
    except FileNotFoundError:
        raise ConfigError(f"{path}: config file not found") from None
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read config file ({exc.strerror})") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" at line {mark.line + 1}" if mark is not None else ""
        raise ConfigError(f"{path}: not valid YAML{where}") from None
    return parse_config(data, base_dir=path.parent, source=str(path))


def json_schema() -> dict[str, Any]:
    """The JSON Schema of :class:`RunConfig`, with ``$schema`` set (for snakemake validate)."""
    schema = RunConfig.model_json_schema()
    return {"$schema": JSON_SCHEMA_DIALECT, **schema}
