"""Sampler kinds: the name in ``sampler.kind`` -> its config section, kinds registered at run
time, and the union that picks a config's sampler section by its kind."""

from __future__ import annotations

from typing import Annotated, Any

from pydantic import (
    Discriminator,
    Tag,
)

from chainyard.config._base import _Strict
from chainyard.config.samplers import (
    AcceptRejectSpec,
    KernelSpec,
    MetropolisSpec,
    SamplerSpec,
    _ChainSampler,
)

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
