"""The sampler protocol every engine implements (ensemble now; MH, user kernels later).

A driver owns its random stream and its current state. The run loop asks it for steps (a
block at a time through an optional ``fill``, else one at a time through ``steps``), stores
each step's rows, and asks for the RNG state only at commit points, so a
driver is resumable exactly when (a) every step is a pure function of (state, RNG state)
and (b) it can be rebuilt from the last stored rows plus that RNG state.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any, NamedTuple, Protocol

import numpy as np
from numpy.typing import NDArray

__all__ = ["SamplerDriver", "StepBlock", "StepRows", "copy_steps", "fill_block"]


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


class StepBlock(NamedTuple):
    """The run loop's buffer, which a driver may fill a block of steps at a time.

    Row ``k`` of every array is one step. A driver with a ``fill(block, a, b)`` method takes
    steps ``a .. b - 1`` writing their rows straight into rows ``a .. b - 1`` (no per-step
    hand-over); its draws are the same as those of ``steps`` and its RNG state is
    consistent when ``fill`` returns. Rows before ``a`` are not read.

    Attributes
    ----------
    position : ndarray, shape (rows, walkers, params)
    log_prob : ndarray, shape (rows, walkers)
    accepted : ndarray of bool, shape (rows, walkers)
    blobs : ndarray, shape (n_blobs, rows, walkers)
    """

    position: NDArray[np.float64]
    log_prob: NDArray[np.float64]
    accepted: NDArray[np.bool_]
    blobs: NDArray[np.float64]


def fill_block(driver: Any, block: StepBlock, a: int, b: int) -> None:
    """Take steps ``a .. b - 1`` into rows ``a .. b - 1`` of ``block``: with the driver's own
    ``fill`` if it has one, else one step at a time from ``driver.steps`` (copies only)."""
    fill = getattr(driver, "fill", None)
    if fill is not None:
        fill(block, a, b)
    else:
        copy_steps(driver, block, a, b)


def copy_steps(driver: Any, block: StepBlock, a: int, b: int) -> None:
    """Take steps ``a .. b - 1`` from ``driver.steps``, copying each into ``block``."""
    position, log_prob, accepted, blobs = block
    n_blobs = blobs.shape[0]
    k = a
    for rows in driver.steps(b - a):
        position[k] = rows.position
        log_prob[k] = rows.log_prob
        accepted[k] = rows.accepted
        if n_blobs:
            blobs[:, k] = rows.blobs.T
        k += 1


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
