"""Completeness of a provenance record: the fields it must fill, and which are missing."""

from __future__ import annotations

from typing import Any

__all__ = ["REQUIRED_FIELDS", "missing_fields"]

#: fields every provenance record must fill ("runs[*]" applies to each run; "git" may be null)
REQUIRED_FIELDS = (
    "subject.path",
    "subject.sha256",
    "generated_by.software.chainyard",
    "generated_by.software.python",
    "generated_by.software.numpy",
    "generated_by.software.emcee",
    "generated_by.software.zarr",
    "generated_by.platform.platform",
    "generated_by.git?",
    "times.started_utc",
    "times.ended_utc",
    "runs",
    "runs[*].config",
    "runs[*].config_sha256",
    "runs[*].sources.model",
    "runs[*].sources.data",
    "runs[*].seed",
    "runs[*].replica",
    "runs[*].spawn_keys.sampler",
    "runs[*].git?",
    "runs[*].started_utc",
    "runs[*].ended_utc",
    "runs[*].segments",
    "inputs",
)


def _values(node: Any, parts: list[str]) -> list[tuple[str, Any, bool]]:
    """(path, value, present) for the dotted path ``parts`` below ``node``."""
    if not parts:
        return [("", node, True)]
    head, rest = parts[0], parts[1:]
    if head.endswith("[*]"):
        key = head[:-3]
        items = node.get(key) if isinstance(node, dict) else None
        if not isinstance(items, list):
            return [(key, None, False)]
        out = []
        for i, item in enumerate(items):
            for sub, value, ok in _values(item, rest):
                out.append((f"{key}[{i}]" + (f".{sub}" if sub else ""), value, ok))
        return out
    if isinstance(node, list) and head in {"model", "data"}:  # sources by role
        match = [s for s in node if isinstance(s, dict) and s.get("role") == head]
        return [(head, match[0].get("sha256") if match else None, bool(match))]
    if not isinstance(node, dict) or head not in node:
        return [(head, None, False)]
    return [(f"{head}.{s}" if s else head, v, ok) for s, v, ok in _values(node[head], rest)]


def missing_fields(record: dict[str, Any]) -> list[str]:
    """The :data:`REQUIRED_FIELDS` a provenance record does not fill (empty when complete).

    A field ending in ``?`` must be present but may be null (facts "when available", such
    as git state outside a work tree). ``runs[*].sources.data`` is required only for runs
    whose config names a data file.
    """
    missing = []
    for field in REQUIRED_FIELDS:
        nullable = field.endswith("?")
        name = field.rstrip("?")
        for path, value, present in _values(record, name.split(".")):
            if name.endswith("sources.data") and not present and "[" in path:
                run = record["runs"][int(path.split("[")[1].split("]")[0])]
                if not ((run.get("config") or {}).get("model") or {}).get("data"):
                    continue
            empty = value in ("", []) and name in ("runs", "inputs")
            if not present or (value is None and not nullable) or empty:
                missing.append(path or name)
    return missing
