"""Run configuration: pydantic models, YAML loading, JSON Schema export.

A run configuration describes one sampling run: the model (log-probability function and
optional data), the ordered parameters with their initialisation, the sampler settings, how the
draws are stored, the seed, the diagnostic targets and the burn-in and thinning policies.
Unknown keys are errors. Every optional field has a documented default; see
``chainyard schema`` for the full schema.

Modules: :mod:`~chainyard.config.model` (model, parameters),
:mod:`~chainyard.config.samplers` (the samplers and their moves),
:mod:`~chainyard.config.sampler_kinds` (``sampler.kind``: the kinds, registering one),
:mod:`~chainyard.config.storage` (stored draws, commits),
:mod:`~chainyard.config.policies` (targets, burn-in, thinning, run until targets),
:mod:`~chainyard.config.run` (the whole run, loading, schema),
:mod:`~chainyard.config.messages` (one line per problem of an invalid config);
:mod:`~chainyard.config.sections` gathers the sections of the first four.
"""

from chainyard.config._base import JSON_SCHEMA_DIALECT
from chainyard.config.messages import format_validation_error
from chainyard.config.model import (
    InitSpec,
    ModelSpec,
    NormalInit,
    NormalSpec,
    Parameter,
    UniformInit,
    UniformSpec,
)
from chainyard.config.policies import (
    BurnInSpec,
    CostAwareThinning,
    DefaultBurnIn,
    ExtendSpec,
    FixedBurnIn,
    FixedThinning,
    FractionBurnIn,
    GewekeBurnIn,
    MserBurnIn,
    NoThinning,
    TargetsSpec,
    TargetThinning,
    TauBurnIn,
    TauThinning,
    ThinningSpec,
)
from chainyard.config.run import (
    RunConfig,
    config_hash,
    json_schema,
    load_config,
    parse_config,
    steps_key,
)
from chainyard.config.sampler_kinds import (
    SAMPLER_KINDS,
    AnySamplerSpec,
    ChainSamplerSpec,
    register_sampler_spec,
)
from chainyard.config.samplers import (
    AcceptRejectSpec,
    DESnookerMove,
    DifferentialEvolutionMove,
    GaussianMove,
    KernelSpec,
    MetropolisSpec,
    MoveSpec,
    NormalEnvelope,
    SamplerSpec,
    StretchMove,
    UniformEnvelope,
    WalkMove,
)
from chainyard.config.storage import StorageSpec

__all__ = [
    "JSON_SCHEMA_DIALECT",
    "SAMPLER_KINDS",
    "AcceptRejectSpec",
    "AnySamplerSpec",
    "BurnInSpec",
    "ChainSamplerSpec",
    "CostAwareThinning",
    "DESnookerMove",
    "DefaultBurnIn",
    "DifferentialEvolutionMove",
    "ExtendSpec",
    "FixedBurnIn",
    "FixedThinning",
    "FractionBurnIn",
    "GaussianMove",
    "GewekeBurnIn",
    "InitSpec",
    "KernelSpec",
    "MetropolisSpec",
    "ModelSpec",
    "MoveSpec",
    "MserBurnIn",
    "NoThinning",
    "NormalEnvelope",
    "NormalInit",
    "NormalSpec",
    "Parameter",
    "RunConfig",
    "SamplerSpec",
    "StorageSpec",
    "StretchMove",
    "TargetThinning",
    "TargetsSpec",
    "TauBurnIn",
    "TauThinning",
    "ThinningSpec",
    "UniformEnvelope",
    "UniformInit",
    "UniformSpec",
    "WalkMove",
    "config_hash",
    "format_validation_error",
    "json_schema",
    "load_config",
    "parse_config",
    "register_sampler_spec",
    "steps_key",
]
