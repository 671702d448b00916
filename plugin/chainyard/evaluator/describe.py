"""One-line descriptions of what user code raised or returned (for the model errors)."""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["describe_exception"]

#: dtype kinds a log-probability or blob may have (signed, unsigned integer, float)
_REAL_KINDS = "fiu"


def describe_exception(exc: BaseException) -> tuple[str, str]:
    """What user code raised, and a hint for the ones that are not ordinary errors.

    Returns
    -------
    what : str
        E.g. ``"ZeroDivisionError: tau is zero"`` or ``"SystemExit(0)"``.
    hint : str
        Empty for ordinary exceptions.
    """
    name = type(exc).__name__
    if isinstance(exc, SystemExit):
        return f"{name}({_short(exc.code)})", "a model must return a value, not exit"
    if isinstance(exc, KeyboardInterrupt):
        return name, (
            "a model must not raise KeyboardInterrupt (chainyard stops on SIGINT/SIGTERM by itself)"
        )
    if isinstance(exc, GeneratorExit):
        return name, "a model must return a value (is log_prob a generator?)"
    text = " ".join(str(exc).split())  # one line, whatever the message holds
    if len(text) > 300:
        text = text[:297] + "..."
    what = f"{name}: {text}" if text else name
    if not isinstance(exc, Exception):
        return what, "a model must return a value"
    return what, ""


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _real_or_problem(value: Any) -> float | str:
    """``value`` as a float if it is one real number, else a description of what it is."""
    if isinstance(value, float):
        return value
    if isinstance(value, bool | np.bool_):
        return f"a bool ({value!r})"
    if isinstance(value, int | np.integer | np.floating):
        return float(value)
    if isinstance(value, np.ndarray):
        if value.ndim == 0 and value.dtype.kind in _REAL_KINDS:
            return float(value)
        return f"an array of shape {value.shape} and dtype {value.dtype}"
    if isinstance(value, complex | np.complexfloating):
        return f"a complex number {value!r}"
    if value is None:
        return "None"
    return f"{type(value).__name__} {_short(value)}"
