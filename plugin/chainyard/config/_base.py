"""Shared base of every config section."""

from __future__ import annotations

from pydantic import (
    BaseModel,
    ConfigDict,
)

JSON_SCHEMA_DIALECT = "https://json-schema.org/draft/2020-12/schema"


class _Strict(BaseModel):
    """Base for every config section: unknown keys are errors, values are immutable."""

    model_config = ConfigDict(extra="forbid", frozen=True)
