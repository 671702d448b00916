"""Messages for an invalid run config: one line per problem, with file, field path, value and
what is allowed."""

from __future__ import annotations

from typing import Any

from pydantic import (
    BaseModel,
    ValidationError,
)

from chainyard.config.allowed import unknown_key_hint
from chainyard.config.model import NAME_PATTERN
from chainyard.config.sampler_kinds import REGISTERED_TAG, SAMPLER_KINDS, sampler_keys


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
