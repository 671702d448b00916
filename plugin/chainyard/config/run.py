"""The run configuration as a whole: validation, messages, YAML loading, JSON Schema."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

from pydantic import (
    BaseModel,
    Field,
    PrivateAttr,
    ValidationError,
    model_validator,
)

from chainyard.config._base import JSON_SCHEMA_DIALECT, _Strict
from chainyard.config.allowed import unknown_key_hint
from chainyard.config.policies import (
    BurnInSpec,
    DefaultBurnIn,
    ExtendSpec,
    NoThinning,
    TargetsSpec,
    ThinningSpec,
)
from chainyard.config.sections import (
    CODEC_MAX_LEVEL,
    NAME_PATTERN,
    REGISTERED_TAG,
    SAMPLER_KINDS,
    AcceptRejectSpec,
    AnySamplerSpec,
    DESnookerMove,
    DifferentialEvolutionMove,
    GaussianMove,
    MetropolisSpec,
    ModelSpec,
    Parameter,
    SamplerSpec,
    StorageSpec,
    WalkMove,
    sampler_keys,
)
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


def format_validation_error(
    error: ValidationError, source: str, model: type[BaseModel] | None = None
) -> list[str]:
    """Turn a pydantic error into one line per problem: file, field path, value, what is allowed.

    Parameters
    ----------
    error : ValidationError
        The error pydantic raised.
    source : str
        The config file's name, prefixed to every line.
    model : type of BaseModel, optional
        The model validated: an unknown key's line then lists the keys allowed there.
    """
    lines = []
    for item in error.errors(include_url=False):
        loc = _clean_loc(item["loc"])
        where = f"{source}: {loc}" if loc else source
        kind = item["type"]
        msg = item["msg"]
        if msg.startswith("Value error, "):
            msg = msg[len("Value error, ") :]
        msg = msg.replace("a valid tuple", "a list").replace("Tuple should", "List should")
        msg = msg.replace(" after validation", "")
        if kind == "string_pattern_mismatch" and (item.get("ctx") or {}).get("pattern") == (
            NAME_PATTERN
        ):
            msg = "a name starts with a letter or '_' and holds only letters, digits, '_', '.', '-'"
        if kind == "union_tag_not_found":
            key = (item.get("ctx") or {}).get("discriminator", "kind").strip("'")
            lines.append(f"{where}.{key}: required key is missing" if loc else f"{where}: {msg}")
        elif kind == "extra_forbidden" and _other_kind_key(item["loc"]):
            key, own = _other_kind_key(item["loc"])
            lines.append(
                f"{where}: not a setting of kind {own} (it has "
                f"{', '.join(sampler_keys(own)[:3])}, ...)"
            )
        elif kind == "sampler_kind" and not isinstance(item.get("input"), dict):
            lines.append(
                f"{where} = {_short(item.get('input'))}: must be a mapping of sampler settings"
            )
        elif kind == "sampler_kind":
            lines.append(f"{source}: sampler.kind = {_short(_kind_of(item.get('input')))}: {msg}")
        elif kind == "extra_forbidden":
            hint = unknown_key_hint(model, item["loc"]) if model is not None else ""
            hint = f"; {hint}" if hint else ""
            lines.append(f"{where}: unknown key (check the spelling; see `chainyard schema`){hint}")
        elif kind == "missing":
            lines.append(f"{where}: required key is missing")
        else:
            value = item.get("input")
            shown = _short(value)
            lines.append(f"{where} = {shown}: {msg}" if loc else f"{where}: {msg}")
    return lines


#: the policy tags pydantic puts into the path of burn_in/thinning errors
_POLICY_TAGS = {
    "default", "fixed", "fraction", "tau_multiple", "mser", "geweke",
    "none", "tau", "target_draws", "cost_aware",
}  # fmt: skip


def _other_kind_key(loc: tuple[int | str, ...]) -> tuple[str, str] | None:
    """(key, kind) when ``loc`` is a key of another sampler kind given under ``kind``."""
    if len(loc) != 3 or loc[0] != "sampler" or loc[1] not in SAMPLER_KINDS:
        return None
    key, own = str(loc[2]), str(loc[1])
    others = {k for name in SAMPLER_KINDS if name != own for k in sampler_keys(name)}
    return (key, own) if key in others | {"walkers", "steps", "draws"} else None


def _kind_of(value: Any) -> Any:
    return value.get("kind") if isinstance(value, dict) else value


def _clean_loc(loc: tuple[int | str, ...]) -> str:
    if len(loc) >= 2 and loc[0] == "sampler" and loc[1] in (*SAMPLER_KINDS, REGISTERED_TAG):
        loc = (loc[0], *loc[2:])  # the kind tag pydantic puts into the path
    if len(loc) >= 2 and loc[0] in ("burn_in", "thinning") and loc[1] in _POLICY_TAGS:
        loc = (loc[0], *loc[2:])
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
    # the envelope's form tag (one entry or a list) and its kind tag repeated
    text = text.replace(".envelope.one", ".envelope").replace(".envelope.list[", ".envelope[")
    if ".envelope" in text:
        for tag in ("normal", "uniform"):
            text = text.replace(f".{tag}.{tag}", f".{tag}")
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
