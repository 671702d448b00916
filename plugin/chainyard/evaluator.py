"""The guarded evaluator: the user's log-probability function made safe to call on an ensemble.

The sampler only ever sees well-formed output. Parameters outside their bounds get -inf
without calling the model. Anything the model does instead of returning a value (raising any
exception, ``sys.exit``, ``KeyboardInterrupt``, ``GeneratorExit``, running past
``model.call_time_limit_seconds``), and any result that is not exactly what was asked for (a
non-finite NaN/+inf, a wrong shape, a complex, object, string or ``None`` value) becomes a
one-line :class:`~chainyard.errors.ModelError` naming the step (when the driver sets it), the
walker and the parameter values. Nothing is reshaped or converted silently.

Two exceptions pass through untouched: chainyard's own stop signal
(:class:`chainyard.engine.run.Interrupted`, raised on a second SIGINT/SIGTERM) and a real
Ctrl-C outside the run loop (told from a model's own ``raise KeyboardInterrupt`` by the SIGINT
recorder :func:`watch_sigint` installs in place of Python's default handler).
"""

from __future__ import annotations

import signal
import sys
import threading
import time
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.errors import ModelError

__all__ = ["LoadedModel", "describe_exception", "watch_sigint"]

#: dtype kinds a log-probability or blob may have (signed, unsigned integer, float)
_REAL_KINDS = "fiu"


class _CallTimedOut(BaseException):
    """Raised by the SIGALRM handler inside a user call that ran past its limit.

    A BaseException so that a model's ``except Exception`` does not swallow it.
    """


def _is_stop_signal(exc: BaseException) -> bool:
    """True for chainyard's own stop signal (``engine.run.Interrupted``), which must pass."""
    run = sys.modules.get("chainyard.engine.run")
    return run is not None and isinstance(exc, run.Interrupted)


#: the KeyboardInterrupt the SIGINT recorder raised last (a real Ctrl-C)
_last_sigint: list[BaseException | None] = [None]


def _record_sigint(signum: int, frame: Any) -> None:
    """SIGINT handler that acts like Python's default one (raises KeyboardInterrupt) and
    remembers the exception, so that a real Ctrl-C can be told from a KeyboardInterrupt that
    user code raised itself."""
    exc = KeyboardInterrupt()
    _last_sigint[0] = exc
    raise exc


def watch_sigint() -> None:
    """Replace Python's default SIGINT handler by the equivalent recorder (main thread only).

    Ctrl-C behaves exactly as before (KeyboardInterrupt); chainyard can now tell it from a
    ``raise KeyboardInterrupt`` in user code. Any other handler in force is left alone.
    """
    if threading.current_thread() is not threading.main_thread():
        return
    if signal.getsignal(signal.SIGINT) is signal.default_int_handler:
        signal.signal(signal.SIGINT, _record_sigint)


def _is_real_ctrl_c(exc: BaseException) -> bool:
    """Whether a KeyboardInterrupt from user code comes from a real SIGINT (let it pass).

    With the recorder installed, only the exception it raised is real. With Python's default
    handler (recorder not installed, e.g. outside the main thread) it cannot be told, and is
    taken as real. With any other handler (the run loop's, which sets a flag and never raises
    KeyboardInterrupt), the model raised it.
    """
    if not isinstance(exc, KeyboardInterrupt):
        return False
    handler = signal.getsignal(signal.SIGINT)
    if handler is _record_sigint:
        return exc is _last_sigint[0]
    return handler is signal.default_int_handler


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


class _Alarm:
    """A per-call wall-time limit through ``setitimer(ITIMER_REAL)`` and SIGALRM.

    Armed for one batch of calls (``with``): the previous SIGALRM handler and any running
    real-time timer are restored afterwards (the timer with its remaining time). Only usable
    in the main thread (Python runs signal handlers there).
    """

    def __init__(self, seconds: float) -> None:
        self.seconds = seconds
        self.fired = False
        self._active = False

    def _handler(self, signum: int, frame: Any) -> None:
        if self._active:
            self.fired = True
            raise _CallTimedOut()

    def __enter__(self) -> _Alarm:
        self.fired = False
        self._old_handler = signal.signal(signal.SIGALRM, self._handler)
        self._old_timer = signal.setitimer(signal.ITIMER_REAL, 0)
        self._t0 = time.monotonic()
        return self

    def arm(self) -> None:
        self._active = True
        signal.setitimer(signal.ITIMER_REAL, self.seconds)

    def disarm(self) -> None:
        signal.setitimer(signal.ITIMER_REAL, 0)
        self._active = False

    def __exit__(self, *exc: object) -> None:
        self._active = False
        signal.setitimer(signal.ITIMER_REAL, 0)
        # None: the previous handler was not installed from Python (restore the default)
        old = self._old_handler if self._old_handler is not None else signal.SIG_DFL
        signal.signal(signal.SIGALRM, old)
        delay, interval = self._old_timer
        if delay > 0:
            left = delay - (time.monotonic() - self._t0)
            signal.setitimer(signal.ITIMER_REAL, max(left, 1e-6), interval)


@dataclass
class LoadedModel:
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

    # ------------------------------------------------------------------ messages
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

    def _blob_labels(self) -> list[str]:
        if len(self.blob_names) == self.n_blobs:
            return [repr(b) for b in self.blob_names]
        return [f"blob {k}" for k in range(self.n_blobs)]

    def _raise_bad(self, thetas: NDArray[np.float64], lp: NDArray[np.float64]) -> None:
        nan = np.flatnonzero(np.isnan(lp))
        if nan.size:
            raise self._fail(thetas, int(nan[0]), "returned NaN")
        raise self._fail(thetas, int(np.flatnonzero(lp == np.inf)[0]), "returned +inf")

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
