"""The keys a config section allows, for the one-line message about an unknown key."""

from __future__ import annotations

import difflib
import typing
from typing import Any

from pydantic import BaseModel

__all__ = ["unknown_key_hint"]


def _models_in(annotation: Any) -> list[type[BaseModel]]:
    """Pydantic models inside a type annotation (through Optional, list, dict, unions)."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    found: list[type[BaseModel]] = []
    for arg in typing.get_args(annotation):
        found += _models_in(arg)
    return found


def _tagged(model: type[BaseModel], tag: str) -> bool:
    """Whether one of ``model``'s fields is a literal equal to ``tag`` (a union's tag)."""
    for field in model.model_fields.values():
        if typing.get_origin(field.annotation) is typing.Literal and tag in typing.get_args(
            field.annotation
        ):
            return True
    return False


def _keys(model: type[BaseModel]) -> list[str]:
    return [f.alias or name for name, f in model.model_fields.items()]


def _section(root: type[BaseModel], loc: tuple[int | str, ...]) -> type[BaseModel] | None:
    """The model that holds the last element of ``loc`` (None when it cannot be told)."""
    candidates = [root]
    for part in loc[:-1]:
        if isinstance(part, int):
            continue  # a list index: the candidates are already the items' models
        inner = [
            m
            for c in candidates
            if part in c.model_fields
            for m in _models_in(c.model_fields[part].annotation)
        ]
        if inner:
            candidates = list(dict.fromkeys(inner))
            continue
        tagged = [c for c in candidates if _tagged(c, part)]
        if tagged:
            candidates = tagged  # pydantic puts a tagged union's tag into the path
        # else: a mapping key (e.g. a name the user chose): the candidates stay
    return candidates[0] if len(candidates) == 1 else None


def unknown_key_hint(root: type[BaseModel], loc: tuple[int | str, ...]) -> str:
    """``"did you mean 'x'? allowed: a, b, x"`` for the unknown key at ``loc`` (or ``""``).

    Parameters
    ----------
    root : type of BaseModel
        The model that was validated (e.g. ``RunConfig``).
    loc : tuple
        Pydantic's location of the unknown key, as in ``ValidationError.errors()``.
    """
    if not loc or not isinstance(loc[-1], str):
        return ""
    model = _section(root, loc)
    if model is None:
        return ""
    keys = _keys(model)
    close = difflib.get_close_matches(loc[-1], keys, n=1)
    guess = f"did you mean '{close[0]}'? " if close else ""
    return f"{guess}allowed: {', '.join(keys)}"
