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

The parts: :mod:`~chainyard.evaluator.loaded` (:class:`LoadedModel`: the calls and the
checks of their results), :mod:`~chainyard.evaluator.messages` (the one-line errors),
:mod:`~chainyard.evaluator.describe` (what user code raised or returned),
:mod:`~chainyard.evaluator.interrupts` (the exceptions that pass through) and
:mod:`~chainyard.evaluator.timelimit` (the per-call time limit).
"""

from __future__ import annotations

from chainyard.evaluator.describe import describe_exception
from chainyard.evaluator.interrupts import watch_sigint
from chainyard.evaluator.loaded import LoadedModel

__all__ = ["LoadedModel", "describe_exception", "watch_sigint"]
