"""The guarded evaluator itself: :class:`LoadedModel`, its calls and the checks of their
results (bounds, output types and shapes, NaN and +inf, the time limit armed per batch).
"""

from __future__ import annotations

import threading
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.errors import ModelError
from chainyard.evaluator.describe import _REAL_KINDS, _real_or_problem, _short
from chainyard.evaluator.messages import ModelMessages
from chainyard.evaluator.timelimit import _Alarm, _CallTimedOut

__all__ = ["LoadedModel"]


@dataclass
class LoadedModel(ModelMessages):
    """A user's model made safe to call on a whole ensemble.

    Attributes
    ----------
    func : callable
        The user's log-probability function.
    data : object
        What was loaded from the data file (None if no file).
    vectorized : bool
        Whether ``func`` takes (walkers, params) at once.
    lower, upper : ndarray, shape (params,)
        Bounds (-inf / +inf where open).
    param_names : tuple of str
        For error messages.
    n_blobs : int
        Number of scalar values returned after the log-probability.
    walkers : int
        Walkers of the ensemble (0: unknown). A batch of exactly this many rows is the whole
        ensemble, and messages name its row as the walker; a smaller batch (the half of the
        ensemble an ensemble move updates, or redrawn starts) is named as a proposal.
    call_time_limit : float or None
        ``model.call_time_limit_seconds``: wall-time limit of one user call (s). Enforced
        with SIGALRM in the main thread only; in other threads it is not enforced. Code that
        is stuck in compiled code and never returns to the Python interpreter cannot be
        interrupted (the signal is handled when the interpreter next runs).
    blob_names : tuple of str
        Names of the blobs, for messages.

    Other attributes
    ----------------
    step : int or None
        The step being computed, if the driver sets it (named in messages).
    in_user_call : bool
        True while a batch of user calls is in progress (cheap to read, e.g. from a signal
        handler deciding whether the process is stuck in the model).
    parallel : object or None
        Set by :mod:`chainyard.engine.pool` while a run may evaluate batches in worker
        processes: ``parallel.evaluate(model, thetas)`` then answers every call, with the
        same values and errors as :meth:`evaluate_serial`.
    """

    func: Any
    data: Any
    vectorized: bool
    lower: NDArray[np.float64]
    upper: NDArray[np.float64]
    param_names: tuple[str, ...]
    n_blobs: int
    walkers: int = 0
    call_time_limit: float | None = None
    blob_names: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        self.bounded = bool(np.isfinite(self.lower).any() or np.isfinite(self.upper).any())
        """Whether any parameter has a finite bound (outside them: -inf, model not called)."""
        self._plain_vectorized = (
            self.vectorized and not self.bounded and self.n_blobs == 0 and not self.call_time_limit
        )
        self.step: int | None = None
        self.in_user_call = False
        self.parallel: Any = None
        self._alarm: _Alarm | None = None
        #: (offset, total) while a worker evaluates rows offset.. of a batch of ``total``
        self._frame: tuple[int, int] | None = None

    # ------------------------------------------------------------------ calls
    def _user(self, arg: NDArray[np.float64]) -> Any:
        """One user call, under the time limit if one is armed."""
        alarm = self._alarm
        if alarm is None:
            return self.func(arg, self.data)
        alarm.arm()
        try:
            out = self.func(arg, self.data)
        finally:
            alarm.disarm()
        if alarm.fired:  # the model caught our exception and went on
            raise _CallTimedOut()
        return out

    def __call__(self, thetas: NDArray[np.float64]) -> NDArray[np.float64]:
        """Evaluate every walker.

        Parameters
        ----------
        thetas : ndarray, shape (walkers, params)

        Returns
        -------
        ndarray, shape (walkers,) or (walkers, 1 + n_blobs)
            Log-probability (and blobs, NaN for walkers outside the bounds).
        """
        if self.parallel is not None:
            return self.parallel.evaluate(self, thetas)  # type: ignore[no-any-return]
        return self.evaluate_serial(thetas)

    def checked(self, thetas: NDArray[np.float64]) -> NDArray[np.float64]:
        """:meth:`__call__` with the fewest steps for the common case (the sampler's hot path).

        A vectorized model without bounds, blobs, time limit or worker pool is called
        directly and its answer accepted when it is already a float64 array of shape
        (walkers,) whose sum is below +inf (no NaN, no +inf); anything else takes the full
        path of :meth:`__call__`, so values and messages are the same.
        """
        if not self._plain_vectorized or self.parallel is not None:
            return self(thetas)
        self.in_user_call = True
        try:
            result = self.func(thetas, self.data)
        except BaseException as exc:
            raise self._fail_batch(thetas, *self._raised(exc)) from None
        finally:
            self.in_user_call = False
        if (
            type(result) is np.ndarray
            and result.dtype == np.float64
            and result.shape == (thetas.shape[0],)
            and np.add.reduce(result) < np.inf
        ):
            return result
        return self.check_rows(thetas, self._batch_array(result, thetas, thetas.shape[0]))

    def evaluate_serial(self, thetas: NDArray[np.float64]) -> NDArray[np.float64]:
        """:meth:`__call__` in this process (the worker pool's fallback and reference)."""
        return self._guarded(self._evaluate, thetas)

    def evaluate_slice(
        self, thetas: NDArray[np.float64], offset: int, total: int, step: int | None
    ) -> NDArray[np.float64]:
        """Rows ``offset .. offset + len(thetas)`` of a batch of ``total`` (in a worker).

        The user calls, bounds, time limit and type checks are those of :meth:`__call__` and
        messages name the row of the whole batch; the check for NaN and +inf is left to
        :meth:`check_rows` on the whole batch, so that the first bad walker is named as in
        a serial run.

        Returns
        -------
        ndarray, shape (k,) or (k, 1 + n_blobs)
        """
        self.step = step
        self._frame = (offset, total)
        try:
            return self._guarded(self._rows, thetas)
        finally:
            self._frame = None

    def _guarded(self, work: Any, thetas: NDArray[np.float64]) -> NDArray[np.float64]:
        """``work(thetas)`` with the call-time limit armed (main thread only)."""
        self.in_user_call = True
        try:
            if self.call_time_limit is None:
                return work(thetas)  # type: ignore[no-any-return]
            if threading.current_thread() is not threading.main_thread():
                return work(thetas)  # type: ignore[no-any-return]  # not enforced here
            with _Alarm(self.call_time_limit) as alarm:
                self._alarm = alarm
                try:
                    return work(thetas)  # type: ignore[no-any-return]
                finally:
                    self._alarm = None
        finally:
            self.in_user_call = False

    def _evaluate(self, thetas: NDArray[np.float64]) -> NDArray[np.float64]:
        return self.check_rows(thetas, self._rows(thetas))

    def check_rows(
        self, thetas: NDArray[np.float64], out: NDArray[np.float64]
    ) -> NDArray[np.float64]:
        """``out`` (from :meth:`_rows` or gathered slices), or the ModelError naming the first
        walker whose log-probability is NaN or +inf."""
        lp = out if out.ndim == 1 else out[:, 0]
        # a sum that is NaN or +inf flags any NaN or +inf (or a finite overflow) in one
        # cheap pass; the exact check runs only then
        if not np.add.reduce(lp) < np.inf and not (lp < np.inf).all():
            self._raise_bad(thetas, lp)
        return out

    def _rows(self, thetas: NDArray[np.float64]) -> NDArray[np.float64]:
        """Every walker's values, not yet checked for NaN or +inf."""
        if self.n_blobs == 0 and not self.bounded:
            if self.vectorized:
                return self._call_vectorized_plain(thetas)
            return self._loop_plain(thetas)
        n = thetas.shape[0]
        inside = np.all((thetas >= self.lower) & (thetas <= self.upper), axis=1)
        out = np.full((n, 1 + self.n_blobs), np.nan)
        out[:, 0] = -np.inf
        idx = np.flatnonzero(inside)
        if idx.size:
            if self.vectorized:
                self._call_vectorized(thetas, idx, out)
            else:
                for i in idx:
                    try:
                        result = self._user(thetas[i])
                    except ModelError:
                        raise
                    except BaseException as exc:
                        raise self._fail(thetas, int(i), *self._raised(exc)) from None
                    self._split_scalar(result, thetas, int(i), out[i])
        return out[:, 0] if self.n_blobs == 0 else out

    def _split_scalar(
        self, out: Any, thetas: NDArray[np.float64], i: int, row: NDArray[np.float64]
    ) -> None:
        """Check one walker's result and write log-prob and blobs into ``row``."""
        if self.n_blobs:
            if not isinstance(out, tuple | list) or len(out) != 1 + self.n_blobs:
                got = f"{len(out)} value(s)" if isinstance(out, tuple | list) else _short(out)
                raise self._fail(
                    thetas,
                    i,
                    f"returned {got}",
                    f"expected a tuple (log_prob, {', '.join(self._blob_labels())})",
                )
            parts = list(out)
        else:
            parts = [out]
        for j, part in enumerate(parts):
            value = _real_or_problem(part)
            if isinstance(value, str):
                label = "" if j == 0 else f" for blob {self._blob_labels()[j - 1]}"
                raise self._fail(thetas, i, f"returned {value}{label}", "expected a real number")
            row[j] = value

    def _loop_plain(self, thetas: NDArray[np.float64]) -> NDArray[np.float64]:
        """Fast path: one call per walker, no bounds, no blobs."""
        f, data = self.func, self.data
        timed = self._alarm is not None
        lp = np.empty(thetas.shape[0])
        for i in range(thetas.shape[0]):
            try:
                value = self._user(thetas[i]) if timed else f(thetas[i], data)
            except BaseException as exc:
                raise self._fail(thetas, i, *self._raised(exc)) from None
            if isinstance(value, float):  # float and numpy float64
                lp[i] = value
                continue
            real = _real_or_problem(value)
            if isinstance(real, str):
                raise self._fail(thetas, i, f"returned {real}", "expected a real number")
            lp[i] = real
        return lp

    def _batch_array(
        self, result: Any, thetas: NDArray[np.float64], n: int, label: str = ""
    ) -> NDArray[np.float64]:
        """A vectorized result as float64 of shape (n,), or a ModelError saying what it was."""
        if type(result) is np.ndarray and result.dtype == np.float64 and result.shape == (n,):
            return result
        want = f"expected shape ({n},), one real number per walker"
        if result is None or isinstance(result, str | bytes | dict | set):
            raise self._fail_batch(thetas, f"returned {_short(result)}{label}", want)
        try:
            arr = np.asarray(result)
        except (TypeError, ValueError) as exc:
            raise self._fail_batch(
                thetas,
                f"returned {type(result).__name__} that is not an array{label} ({exc})",
                want,
            ) from None
        if arr.ndim == 0:
            raise self._fail_batch(
                thetas, f"returned a single value ({_short(result)}){label}", want
            )
        if arr.dtype.kind not in _REAL_KINDS:
            raise self._fail_batch(thetas, f"returned values of dtype {arr.dtype}{label}", want)
        if arr.shape != (n,):
            raise self._fail_batch(thetas, f"returned shape {arr.shape}{label}", want)
        return arr.astype(np.float64, copy=False)

    def _call_vectorized_plain(self, thetas: NDArray[np.float64]) -> NDArray[np.float64]:
        """Fast path: all walkers in one call, no bounds, no blobs."""
        try:
            result = self._user(thetas)
        except BaseException as exc:
            raise self._fail_batch(thetas, *self._raised(exc)) from None
        return self._batch_array(result, thetas, thetas.shape[0])

    def _call_vectorized(
        self, thetas: NDArray[np.float64], idx: NDArray[np.intp], out: NDArray[np.float64]
    ) -> None:
        sub = thetas[idx]
        try:
            result = self._user(sub)
        except BaseException as exc:
            raise self._fail_batch(sub, *self._raised(exc)) from None
        if self.n_blobs:
            if not isinstance(result, tuple | list) or len(result) != 1 + self.n_blobs:
                raise self._fail_batch(
                    sub,
                    f"returned {_short(result)}",
                    f"expected a tuple of {1 + self.n_blobs} arrays (log_prob, "
                    f"{', '.join(self._blob_labels())}), each of shape ({idx.size},)",
                )
            parts = list(result)
        else:
            parts = [result]
        for j, part in enumerate(parts):
            label = "" if j == 0 else f" for blob {self._blob_labels()[j - 1]}"
            out[idx, j] = self._batch_array(part, sub, idx.size, label)
