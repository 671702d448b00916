"""Convert numpy containers and scalars to plain JSON-serialisable Python."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np


def to_builtin(value: Any) -> Any:
    """Recursively convert numpy scalars/arrays, tuples and mappings to builtins.

    Parameters
    ----------
    value : Any

    Returns
    -------
    Any
        Only ``dict``, ``list``, ``str``, ``int``, ``float``, ``bool`` and ``None``.
        Non-finite floats are kept as ``float('nan')`` / ``inf`` (``json.dumps``
        writes them as ``NaN`` / ``Infinity``).
    """
    if isinstance(value, Mapping):
        return {str(k): to_builtin(v) for k, v in value.items()}
    if isinstance(value, np.ndarray):
        return [to_builtin(v) for v in value.tolist()]
    if isinstance(value, (list, tuple)):
        return [to_builtin(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value)
    if value is None or isinstance(value, str):
        return value
    raise TypeError(f"cannot convert {type(value).__name__} to a JSON-able value")
