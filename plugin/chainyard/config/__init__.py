"""Run configuration: pydantic models, YAML loading, JSON Schema export.

A run configuration describes one sampling run: the model (log-probability function and
optional data), the ordered parameters with their initialisation, the sampler settings, how the
draws are stored, the seed, the diagnostic targets and the burn-in and thinning policies.
Unknown keys are errors. Every optional field has a documented default; see
``chainyard schema`` for the full schema.

Modules: :mod:`~chainyard.config.sections` (model, parameters, sampler, storage),
:mod:`~chainyard.config.policies` (targets, burn-in, thinning, run until targets),
:mod:`~chainyard.config.run` (the whole run, messages, loading, schema).
"""

from chainyard.config._base import JSON_SCHEMA_DIALECT
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
    format_validation_error,
    json_schema,
    load_config,
    parse_config,
)
from chainyard.config.sections import (
    DESnookerMove,
    DifferentialEvolutionMove,
    GaussianMove,
    InitSpec,
    ModelSpec,
    MoveSpec,
    NormalInit,
    NormalSpec,
    Parameter,
    SamplerSpec,
    StorageSpec,
    StretchMove,
    UniformInit,
    UniformSpec,
    WalkMove,
)

__all__ = [
    "JSON_SCHEMA_DIALECT",
    "BurnInSpec",
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
    "ModelSpec",
    "MoveSpec",
    "MserBurnIn",
    "NoThinning",
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
    "UniformInit",
    "UniformSpec",
    "WalkMove",
    "config_hash",
    "format_validation_error",
    "json_schema",
    "load_config",
    "parse_config",
]
