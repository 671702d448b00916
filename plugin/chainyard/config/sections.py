"""Config sections of one run: model, parameters, sampler and moves, storage.

The sections live in modules by topic: :mod:`~chainyard.config.model` (model, parameters),
:mod:`~chainyard.config.samplers` (the samplers and moves),
:mod:`~chainyard.config.sampler_kinds` (``sampler.kind``: the kinds, registration, the union)
and :mod:`~chainyard.config.storage`; this module gathers them under their former import path.
"""

from __future__ import annotations

from chainyard.config.model import (
    NAME_PATTERN,
    InitSpec,
    ModelSpec,
    NormalInit,
    NormalSpec,
    Parameter,
    UniformInit,
    UniformSpec,
    function_reference,
)
from chainyard.config.sampler_kinds import (
    REGISTERED_TAG,
    SAMPLER_KINDS,
    AnySamplerSpec,
    ChainSamplerSpec,
    register_sampler_spec,
    sampler_keys,
)
from chainyard.config.samplers import (
    AcceptRejectSpec,
    DESnookerMove,
    DifferentialEvolutionMove,
    EnvelopeField,
    EnvelopeSpec,
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
from chainyard.config.storage import CODEC_MAX_LEVEL, StorageSpec

__all__ = [
    "CODEC_MAX_LEVEL",
    "NAME_PATTERN",
    "REGISTERED_TAG",
    "SAMPLER_KINDS",
    "AcceptRejectSpec",
    "AnySamplerSpec",
    "ChainSamplerSpec",
    "DESnookerMove",
    "DifferentialEvolutionMove",
    "EnvelopeField",
    "EnvelopeSpec",
    "GaussianMove",
    "InitSpec",
    "KernelSpec",
    "MetropolisSpec",
    "ModelSpec",
    "MoveSpec",
    "NormalEnvelope",
    "NormalInit",
    "NormalSpec",
    "Parameter",
    "SamplerSpec",
    "StorageSpec",
    "StretchMove",
    "UniformEnvelope",
    "UniformInit",
    "UniformSpec",
    "WalkMove",
    "function_reference",
    "register_sampler_spec",
    "sampler_keys",
]
