"""Frozen decision records shared by the burn-in and thinning policies."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from ..diagnostics._jsonable import to_builtin


@dataclass(frozen=True)
class BurnInDecision:
    """How many initial steps to discard, and why.

    Attributes
    ----------
    policy : str
        Policy name, e.g. ``"mser"`` or ``"default"``.
    inputs : dict
        Everything the policy looked at (JSON-able after :meth:`to_dict`).
    steps_discarded : int
        Number of initial steps (per walker) to drop.
    reason : str
        One human sentence.
    """

    policy: str
    inputs: dict[str, Any] = field(hash=False)
    steps_discarded: int
    reason: str

    def to_dict(self) -> dict[str, Any]:
        """Return a JSON-serialisable dict (numpy types converted to builtins)."""
        return {
            "policy": self.policy,
            "inputs": to_builtin(self.inputs),
            "steps_discarded": int(self.steps_discarded),
            "reason": self.reason,
        }


@dataclass(frozen=True)
class ThinningDecision:
    """Keep every ``factor``-th step, and why.

    Attributes
    ----------
    policy : str
    inputs : dict
    factor : int
        Thinning factor (1 = keep everything).
    reason : str
        One human sentence.
    """

    policy: str
    inputs: dict[str, Any] = field(hash=False)
    factor: int
    reason: str

    def to_dict(self) -> dict[str, Any]:
        """Return a JSON-serialisable dict (numpy types converted to builtins)."""
        return {
            "policy": self.policy,
            "inputs": to_builtin(self.inputs),
            "factor": int(self.factor),
            "reason": self.reason,
        }


def fmt_int(n: int) -> str:
    """Format an integer with thousands separators: 1200 -> '1,200'."""
    return f"{int(n):,}"


def keep_phrase(factor: int) -> str:
    """'Kept every step' for 1, else 'Kept 1 in every 12 steps'."""
    return "Kept every step" if factor == 1 else f"Kept 1 in every {fmt_int(factor)} steps"


def discard_sentence(discarded: int, steps: int, why: str) -> str:
    """'Discarded 1,200 of 20,000 steps: <why>.'"""
    why = why.rstrip(".")
    return f"Discarded {fmt_int(discarded)} of {fmt_int(steps)} steps: {why}."
