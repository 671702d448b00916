"""Reading the data files a run names (CSV, NPZ, JSON): formats, checks and messages.

Nothing here executes code or unpickles: NPZ is read with ``allow_pickle=False``.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.errors import ConfigError

__all__ = ["read_data_file"]


def _read_csv(path: Path) -> dict[str, NDArray[Any]]:
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    if not rows:
        raise ConfigError(f"model.data: {path} is empty (a header row is required)")
    header, body = rows[0], [r for r in rows[1:] if r]
    columns: dict[str, NDArray[Any]] = {}
    for j, name in enumerate(header):
        name = name.strip()
        values = [r[j].strip() if j < len(r) else "" for r in body]
        try:
            columns[name] = np.array([float(v) for v in values], dtype=np.float64)
        except ValueError:
            columns[name] = np.array(values, dtype=str)
    return columns


def _jsonify_arrays(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _jsonify_arrays(v) for k, v in value.items()}
    if (
        isinstance(value, list)
        and value
        and all(isinstance(v, int | float) and not isinstance(v, bool) for v in value)
    ):
        return np.asarray(value, dtype=np.float64)
    return value


def read_data_file(path: Path) -> Any:
    """Read one data file by its suffix.

    CSV: a header row, then rows; returns a dict of column name -> 1-D array (float64 where
    every value parses as a number, else str). NPZ: dict of name -> array (no pickle).
    JSON: the parsed document, with numeric lists turned into float64 arrays.

    Raises
    ------
    ConfigError
        Naming ``model.data``, the file and what is wrong.
    """
    suffix = path.suffix.lower()
    try:
        if suffix == ".csv":
            return _read_csv(path)
        if suffix == ".npz":
            with np.load(path, allow_pickle=False) as npz:
                return {k: npz[k] for k in npz.files}
        if suffix == ".json":
            return _jsonify_arrays(json.loads(path.read_text()))
    except ConfigError:
        raise
    except Exception as exc:
        raise ConfigError(f"model.data: cannot read {path}: {type(exc).__name__}: {exc}") from None
    raise ConfigError(
        f"model.data: {path.name}: unsupported file type {suffix!r}; allowed: .csv, .npz, "
        ".json, or set model.data_loader"
    )
