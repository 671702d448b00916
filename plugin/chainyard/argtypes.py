"""Argument types shared by the command-line parsers (the standard library only, so that
declaring a command imports nothing heavy)."""

from __future__ import annotations

import argparse
import math

__all__ = ["positive_seconds"]


def positive_seconds(text: str) -> float:
    """An argparse type: a finite number of seconds > 0."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number of seconds, got {text!r}") from None
    if not math.isfinite(value) or value <= 0:
        raise argparse.ArgumentTypeError(f"must be a finite number of seconds > 0, got {text}")
    return value
