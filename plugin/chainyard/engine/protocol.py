"""The sampler protocol every engine implements (ensemble now; MH, user kernels later).

A driver owns its random stream and its current state. The run loop asks it for steps one
at a time, stores each step's rows, and asks for the RNG state only at commit points, so a
driver is resumable exactly when (a) every step is a pure function of (state, RNG state)
and (b) it can be rebuilt from the last stored rows plus that RNG state.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any, NamedTuple, Protocol

import numpy as np
from numpy.typing import NDArray

__all__ = ["SamplerDriver", "StepRows"]


class StepRows(NamedTuple):
    """One step of every walker (a named tuple: made at every step, so kept cheap).

    The arrays may be the driver's own and are valid only until the next step: the receiver
    copies what it keeps (the run loop copies them into its buffer at once).

    Attributes
    ----------
    position : ndarray, shape (walkers, params)
    log_prob : ndarray, shape (walkers,)
    accepted : ndarray of bool, shape (walkers,)
    blobs : ndarray, shape (walkers, n_blobs)
    """

    position: NDArray[np.float64]
    log_prob: NDArray[np.float64]
    accepted: NDArray[np.bool_]
    blobs: NDArray[np.float64]


class SamplerDriver(Protocol):
    """What the run loop needs from a sampler."""

    kind: str
    """Short identifier recorded in the store (e.g. ``"emcee.ensemble"``)."""

    def steps(self, n: int) -> Iterator[StepRows]:
        """Advance ``n`` steps, yielding each; the RNG state is consistent at every yield."""
        ...

    def random_state(self) -> dict[str, Any]:
        """The driver's RNG state as plain JSON values."""
        ...
