"""The run configuration as a whole: validation across sections, YAML loading, JSON Schema.

The one-line messages for an invalid config are :mod:`chainyard.config.messages`.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

from pydantic import (
    Field,
    PrivateAttr,
    ValidationError,
    model_validator,
)

from chainyard.config._base import JSON_SCHEMA_DIALECT, _Strict
from chainyard.config.messages import format_validation_error
from chainyard.config.model import ModelSpec, Parameter
from chainyard.config.policies import (
    BurnInSpec,
    DefaultBurnIn,
    ExtendSpec,
    NoThinning,
    TargetsSpec,
    ThinningSpec,
)
from chainyard.config.sampler_kinds import AnySamplerSpec
from chainyard.config.samplers import (
    AcceptRejectSpec,
    DESnookerMove,
    DifferentialEvolutionMove,
    GaussianMove,
    MetropolisSpec,
    SamplerSpec,
    WalkMove,
)
from chainyard.config.storage import CODEC_MAX_LEVEL, StorageSpec
from chainyard.config.yamlfile import read_yaml_file
from chainyard.errors import ConfigError

# --------------------------------------------------------------------------- run


class RunConfig(_Strict):
    """One sampling run."""

    model: ModelSpec
    parameters: tuple[Parameter, ...] = Field(description="Parameters in theta order.")
    sampler: AnySamplerSpec = Field(
        description=(
            "The sampler; 'kind' chooses it (default 'ensemble'). For the other kinds the "
            "store's walkers axis holds independent chains."
        )
    )
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
        ensemble = isinstance(self.sampler, SamplerSpec)
        if ensemble and not self.sampler.moves:
            raise ValueError("sampler.moves: at least one move is required")
        names = [p.name for p in self.parameters]
        dupes = sorted({n for n in names if names.count(n) > 1})
        if dupes:
            raise ValueError(f"parameter names must be unique; repeated: {', '.join(dupes)}")
        n = len(names)
        if ensemble and self.sampler.walkers < 2 * n:
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
            _check_move(i, move, n, self.sampler.walkers)
        _check_chain_sampler(self.sampler, n)
        _check_chunk_size(self)
        _check_codec_level(self.storage)
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
        for key in (
            "burn_in",
            "thinning",
            "targets",
            "description",
            "extend_until_targets",
            "replicas",
        ):
            norm.pop(key, None)
        return norm

    def with_steps(self, steps: int) -> RunConfig:
        """A copy with a different total step count (same base directory)."""
        data = self.model_dump()
        data["sampler"][steps_key(data["sampler"])] = steps
        return parse_config(data, base_dir=self._base_dir, source=self._source)


def steps_key(sampler: dict[str, Any]) -> str:
    """The key holding the run length in a (stored) sampler mapping: 'draws' for
    accept-reject, 'steps' for every other kind."""
    return "draws" if sampler.get("kind") == "accept_reject" else "steps"


def _check_chain_sampler(sampler: Any, n_params: int) -> None:
    """Settings of the independent-chain kinds that depend on the parameter count."""
    sd = sampler.proposal_sd if isinstance(sampler, MetropolisSpec) else None
    if isinstance(sd, tuple) and len(sd) != n_params:
        raise ValueError(
            f"sampler.proposal_sd has {len(sd)} values; need 1 or {n_params} (one per parameter)"
        )
    if isinstance(sampler, AcceptRejectSpec):
        if not isinstance(sampler.envelope, tuple) and n_params != 1:
            raise ValueError(
                f"sampler.envelope: a single mapping is for one parameter; give a list of "
                f"{n_params} (one per parameter, in theta order)"
            )
        if isinstance(sampler.envelope, tuple) and len(sampler.envelope) != n_params:
            raise ValueError(
                f"sampler.envelope has {len(sampler.envelope)} entries; need {n_params} (one "
                "per parameter, in theta order)"
            )


def _check_move(i: int, move: Any, n_params: int, walkers: int) -> None:
    """Move settings that depend on the parameter and walker counts."""
    where = f"sampler.moves[{i}]"
    sd = move.proposal_sd if isinstance(move, GaussianMove) else None
    if isinstance(sd, tuple) and len(sd) != n_params:
        raise ValueError(
            f"{where}.proposal_sd has {len(sd)} values; need 1 or {n_params} (one per parameter)"
        )
    half = walkers // 2  # the complementary half of the ensemble a move draws from
    if isinstance(move, WalkMove) and move.subset_size is not None and move.subset_size > half:
        raise ValueError(
            f"{where}.subset_size = {move.subset_size}: at most walkers // 2 = {half} (the "
            "walkers of the complementary half)"
        )
    if isinstance(move, DifferentialEvolutionMove | DESnookerMove) and walkers < 4:
        raise ValueError(
            f"{where} ({move.kind}) needs at least 4 walkers; sampler.walkers = {walkers}"
        )


def _check_codec_level(storage: StorageSpec) -> None:
    """``storage.level`` must be one the codec accepts (the codecs would clamp it silently)."""
    if storage.level is None:
        return
    top = CODEC_MAX_LEVEL[storage.codec]
    if top is None:
        raise ValueError(f"storage.level = {storage.level}: codec 'none' takes no level (use null)")
    if storage.level > top:
        raise ValueError(
            f"storage.level = {storage.level}: codec {storage.codec!r} allows levels 0-{top}"
        )


def _check_chunk_size(config: RunConfig) -> None:
    """The decoded size of one stored chunk must stay within the ``chunk_bytes`` limit."""
    from chainyard import limits

    steps = config.storage.chunk_steps
    walkers = config.sampler.walkers
    engine_blobs = 1 if isinstance(config.sampler, AcceptRejectSpec) else 0  # proposal counts
    row = len(config.parameters) + 2 + len(config.sampler.blobs) + engine_blobs
    size = steps * walkers * row * 8
    limit = limits.value("chunk_bytes")
    if size > limit:
        env = limits.LIMITS["chunk_bytes"].env
        raise ValueError(
            f"storage.chunk_steps = {steps:,}: one chunk would hold {steps:,} steps x "
            f"{walkers:,} walkers x {row} values x 8 bytes = {size:,} bytes, above the "
            f"chunk_bytes limit of {limit:,}; use fewer steps per chunk (or raise the limit "
            f"with {env})"
        )


def config_hash(settings: dict[str, Any]) -> str:
    """SHA-256 of the canonical JSON (sorted keys, no spaces) of ``settings``."""
    blob = json.dumps(settings, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(blob.encode()).hexdigest()


def parse_config(data: Any, *, base_dir: Path | None = None, source: str = "<config>") -> RunConfig:
    """Validate a mapping as a :class:`RunConfig`.

    Raises
    ------
    ConfigError
        With one line per problem.
    """
    if data is None:
        raise ConfigError(
            f"{source}: the config is empty; it needs at least model, parameters, sampler "
            "and seed (see `chainyard schema`)"
        )
    if not isinstance(data, dict):
        raise ConfigError(f"{source}: must be a mapping of settings, got {type(data).__name__}")
    try:
        config = RunConfig.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(format_validation_error(exc, source, RunConfig)) from None
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
    data = read_yaml_file(path, "config file")
    return parse_config(data, base_dir=path.parent, source=str(path))


def json_schema() -> dict[str, Any]:
    """The JSON Schema of :class:`RunConfig`, with ``$schema`` set (for snakemake validate)."""
    schema = RunConfig.model_json_schema()
    return {"$schema": JSON_SCHEMA_DIALECT, **schema}
