"""Shared base of every config section."""

from __future__ import annotations

import types
import typing
from typing import Any

from pydantic import (
    BaseModel,
    ConfigDict,
    model_validator,
)

JSON_SCHEMA_DIALECT = "https://json-schema.org/draft/2020-12/schema"


def _takes_bool(annotation: Any) -> bool:
    """Whether a field's type admits true/false (bool itself, Any, or a union holding them)."""
    if annotation is bool or annotation is Any:
        return True
    origin = typing.get_origin(annotation)
    if origin is typing.Annotated:
        return _takes_bool(typing.get_args(annotation)[0])
    if origin is typing.Union or origin is types.UnionType:
        return any(_takes_bool(a) for a in typing.get_args(annotation))
    return False


class _Strict(BaseModel):
    """Base for every config section.

    Unknown keys are errors, values are immutable, numbers must be finite (NaN and +-inf are
    refused: ``Input should be a finite number``) and a true/false is never taken for a number
    (YAML reads ``yes``/``no``/``on``/``off`` as booleans).
    """

    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)

    @model_validator(mode="before")
    @classmethod
    def _no_bool_for_numbers(cls, data: Any) -> Any:
        # a true/false given for a number becomes the text 'true'/'false', which the field's
        # own validation then refuses with its usual message, location and value
        if isinstance(data, dict):
            for key, value in data.items():
                field = cls.model_fields.get(key) if isinstance(key, str) else None
                if isinstance(value, bool) and field and not _takes_bool(field.annotation):
                    data = {**data, key: str(value).lower()}
        return data
