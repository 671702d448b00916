"""How numbers are written for people: one readable format, and enough digits near a limit.

Pure functions without imports beyond the standard library (the verdict's lines, the
results table, ``inspect`` and the report all use them).
"""

from __future__ import annotations

import math
from typing import Any

__all__ = ["accept_reject_line", "beside_limit", "count", "readable"]


def readable(value: float | None, digits: int = 4) -> str:
    """``value`` with ``digits`` significant digits, positional where that stays short.

    Positional for 1e-4 <= |value| < 1e9 (thousands separated by commas: ``20,360``,
    ``0.01235``, ``3.142``), scientific otherwise (``1.445e+39``, ``2.5e-07``); ``-`` for a
    missing value, ``nan``/``inf`` as such.
    """
    if value is None:
        return "-"
    x = float(value)
    if not math.isfinite(x):
        return str(x)
    if x == 0.0:
        return "0"
    magnitude = math.floor(math.log10(abs(x)))
    if magnitude < -4 or magnitude >= 9:
        return f"{x:.{digits - 1}e}"
    decimals = max(0, digits - 1 - magnitude)
    return f"{x:,.{decimals}f}"


def count(value: float | None) -> str:
    """A count-like number (ESS, steps) rounded to a whole number: ``20,360``."""
    if value is None:
        return "-"
    x = float(value)
    return f"{round(x):,}" if math.isfinite(x) else str(x)


def beside_limit(value: float, limit: float, decimals: int = 2, most: int = 12) -> str:
    """``value`` with at least ``decimals`` decimals and as many more as it takes to show on
    which side of ``limit`` it lies (1.3029 against 1.3 is ``1.303``, not ``1.30``).

    A value equal to the limit is written with ``decimals`` decimals.
    """
    x = float(value)
    if not math.isfinite(x):
        return str(x)
    for d in range(decimals, most + 1):
        text = f"{x:.{d}f}"
        if x == limit or (float(text) - limit) * (x - limit) > 0:
            return text
    return repr(x)


def accept_reject_line(ar: dict[str, Any]) -> str:
    """One line: acceptance rate, binomial SE, proposals per draw (and 1/M if known), in
    :func:`readable` numbers (shared by ``diagnose`` and ``inspect``); a 1/M below 1e-6 is called
    negligible, one far from the rate marks an unnormalised target."""
    text = (
        f"Accept-reject: acceptance rate {readable(ar['rate'])} +- {readable(ar['se'], 2)} "
        f"(binomial SE; {count(ar['draws'])} draws from {count(ar['proposals'])} proposals, "
        f"{readable(ar['proposals_per_draw'])} per draw)"
    )
    one_over_m = ar.get("one_over_m")
    if one_over_m is not None:
        text += f"; 1/M = {readable(one_over_m)}"
        if one_over_m < 1e-6:
            text += " (negligible: the envelope is far above the target's scale)"
        elif not 0.1 < one_over_m / ar["rate"] < 10.0:
            text += " (far from the rate: the target is not normalised)"
        else:
            text += " (equal to the rate for a normalised target)"
    return text
