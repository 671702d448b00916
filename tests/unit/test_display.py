"""Readable numbers and digits beside a limit (chainyard.display)."""

from __future__ import annotations

import pytest

from chainyard.decisions.targets import _fmt_key
from chainyard.display import beside_limit, count, readable


@pytest.mark.parametrize(
    ("value", "limit", "decimals", "text"),
    [
        (1.3029, 1.3, 2, "1.303"),  # "1.30 > 1.3" hid the side
        (1.2995, 1.3, 2, "1.2995"),
        (1.0104, 1.01, 4, "1.0104"),
        (1.0099, 1.01, 4, "1.0099"),
        (1.0100004, 1.01, 4, "1.0100004"),
        (1.01, 1.01, 4, "1.0100"),
    ],
)
def test_beside_limit_shows_the_side(value: float, limit: float, decimals: int, text: str) -> None:
    assert beside_limit(value, limit, decimals) == text
    shown = float(text)
    assert (shown > limit) == (value > limit) and (shown < limit) == (value < limit)


def test_verdict_failure_lines_show_the_side() -> None:
    assert _fmt_key("tau_growth", 1.3029, 1.3) == "1.303"
    assert _fmt_key("rhat_nested", 1.01004, 1.01) == "1.01004"


@pytest.mark.parametrize(
    ("value", "text"),
    [
        (20360.4, "20,360"),
        (1.0, "1.000"),
        (0.0123456, "0.01235"),
        (-3.14159, "-3.142"),
        (1444959615224340925086137514088695070720.0, "1.445e+39"),
        (2.5e-7, "2.500e-07"),
        (3.558e-4, "0.0003558"),
        (0.0, "0"),
        (None, "-"),
    ],
)
def test_readable(value: float | None, text: str) -> None:
    assert readable(value) == text


def test_count() -> None:
    assert count(20359.7) == "20,360" and count(None) == "-"
