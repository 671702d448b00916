"""Reference values drawn on traces and marginals: a simulation's truths, a previous estimate.

They come from the run config (each parameter's optional ``reference_value``) and, overriding
those, from a file: JSON ``{"name": value, ...}`` or CSV with a header row and the columns
``parameter`` and ``value``. They are only drawn, never used in sampling or diagnostics.
"""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path
from typing import Any

from chainyard.errors import ConfigError

__all__ = ["read_reference_file", "reference_values"]

#: larger reference files are refused (they are a handful of numbers)
MAX_BYTES = 1 << 20


def _number(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float | str):
        raise ConfigError(f"{where}: must be a finite number, got {value!r}")
    try:
        out = float(value)
    except ValueError:
        raise ConfigError(f"{where}: must be a finite number, got {value!r}") from None
    if not math.isfinite(out):
        raise ConfigError(f"{where}: must be a finite number, got {value!r}")
    return out


def read_reference_file(path: str | Path, names: tuple[str, ...]) -> dict[str, float]:
    """Reference values from a JSON or CSV file, checked against the run's parameter names.

    Raises
    ------
    ConfigError
        One line naming the file and the entry: unreadable, too large, wrong layout, a name
        that is not a parameter, or a value that is not a finite number (exit 2).
    """
    path = Path(path)
    try:
        if path.stat().st_size > MAX_BYTES:
            raise ConfigError(f"{path}: larger than {MAX_BYTES:,} bytes; not a reference file")
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the reference values ({exc.strerror})") from None
    except UnicodeDecodeError:
        raise ConfigError(f"{path}: not UTF-8 text") from None
    if path.suffix.lower() == ".json":
        try:
            doc = json.loads(text)
        except ValueError as exc:
            raise ConfigError(f"{path}: not JSON ({exc})") from None
        if not isinstance(doc, dict):
            raise ConfigError(f'{path}: must be a JSON object {{"name": value, ...}}')
        pairs = [(str(k), v, f"{path}: {k}") for k, v in doc.items()]
    elif path.suffix.lower() == ".csv":
        rows = list(csv.reader(text.splitlines()))
        if not rows or [c.strip() for c in rows[0]] != ["parameter", "value"]:
            raise ConfigError(f"{path}: line 1 must be the header 'parameter,value'")
        pairs = []
        for i, row in enumerate(rows[1:], start=2):
            if not row:
                continue
            if len(row) != 2:
                raise ConfigError(f"{path}: line {i}: expected 2 fields, found {len(row)}")
            pairs.append((row[0].strip(), row[1].strip(), f"{path}: line {i}: value"))
    else:
        raise ConfigError(f"{path}: reference values must be a .json or .csv file")
    out: dict[str, float] = {}
    for name, value, where in pairs:
        if name not in names:
            raise ConfigError(
                f"{path}: {name!r} is not a parameter of the run (parameters: {', '.join(names)})"
            )
        out[name] = _number(value, where)
    return out


def reference_values(store: Any, path: str | Path | None = None) -> dict[str, float]:
    """The config's reference values of ``store``'s run, updated by the file at ``path``."""
    out = {
        p.name: float(p.reference_value)
        for p in store.config.parameters
        if getattr(p, "reference_value", None) is not None
    }
    if path is not None:
        out.update(read_reference_file(path, tuple(store.param_names)))
    return out
