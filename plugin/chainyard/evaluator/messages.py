"""The one-line :class:`~chainyard.errors.ModelError` messages of the guarded evaluator.

:class:`ModelMessages` is the messages half of :class:`chainyard.evaluator.LoadedModel` (a
mixin: the model supplies its parameter names, walkers, step, blobs and time limit).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from chainyard.errors import ModelError
from chainyard.evaluator.describe import describe_exception
from chainyard.evaluator.interrupts import _is_real_ctrl_c, _is_stop_signal
from chainyard.evaluator.timelimit import _Alarm, _CallTimedOut

__all__ = ["ModelMessages"]


class ModelMessages:
    """Messages naming the step, walker and parameter values (mixed into LoadedModel)."""

    # provided by LoadedModel
    param_names: tuple[str, ...]
    n_blobs: int
    walkers: int
    call_time_limit: float | None
    blob_names: tuple[str, ...]
    step: int | None
    _alarm: _Alarm | None
    _frame: tuple[int, int] | None

    def _values(self, theta: NDArray[np.float64]) -> str:
        return ", ".join(f"{n}={v:.6g}" for n, v in zip(self.param_names, theta, strict=True))

    def _at(self, thetas: NDArray[np.float64], i: int) -> str:
        n, row = thetas.shape[0], i
        if self._frame is not None:  # a worker's slice: name the row of the whole batch
            row, n = i + self._frame[0], self._frame[1]
        who = f"walker {row}" if n == self.walkers or not self.walkers else f"proposal {row} of {n}"
        step = f"step {self.step}, " if self.step is not None else ""
        return f"at {step}{who} ({self._values(thetas[i])})"

    def _fail(self, thetas: NDArray[np.float64], i: int, what: str, hint: str = "") -> ModelError:
        """The error for row ``i`` of ``thetas``: ``what`` happened, ``hint`` what is allowed."""
        tail = f": {hint}" if hint else ""
        return ModelError(f"model.log_prob {what} {self._at(thetas, i)}{tail}")

    def _fail_batch(self, thetas: NDArray[np.float64], what: str, hint: str = "") -> ModelError:
        """The error for a vectorized call as a whole (no single walker to blame)."""
        n = thetas.shape[0]
        step = f" at step {self.step}" if self.step is not None else ""
        tail = f": {hint}" if hint else ""
        part = ""
        if self._frame is not None:  # a worker's slice of a larger batch
            part = f" of the slice a worker got (rows from {self._frame[0]} of {self._frame[1]})"
        return ModelError(
            f"model.log_prob (vectorized) {what}{step} for {n} walkers{part} "
            f"(first: {self._values(thetas[0])}){tail}"
        )

    def _raised(self, exc: BaseException) -> tuple[str, str]:
        """``(what, hint)`` for an exception from user code; re-raise the ones that pass."""
        if _is_stop_signal(exc) or _is_real_ctrl_c(exc):
            raise exc
        if isinstance(exc, _CallTimedOut) or (self._alarm is not None and self._alarm.fired):
            return (
                f"ran longer than model.call_time_limit_seconds = {self.call_time_limit:g} s",
                "stopped (make the model faster or raise the limit)",
            )
        what, hint = describe_exception(exc)
        return f"raised {what}", hint

    def _blob_labels(self) -> list[str]:
        if len(self.blob_names) == self.n_blobs:
            return [repr(b) for b in self.blob_names]
        return [f"blob {k}" for k in range(self.n_blobs)]

    def _raise_bad(self, thetas: NDArray[np.float64], lp: NDArray[np.float64]) -> None:
        nan = np.flatnonzero(np.isnan(lp))
        if nan.size:
            raise self._fail(thetas, int(nan[0]), "returned NaN")
        raise self._fail(thetas, int(np.flatnonzero(lp == np.inf)[0]), "returned +inf")
