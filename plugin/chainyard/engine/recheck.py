"""The determinism check beyond the first commit: one sampled state per commit, at low cost.

The first-commit checks (``model.check_deterministic``, ``sampler.check_rng``) only see the
start of a run. A model or kernel that draws from another source of randomness only in some
region (say ``|x| > 3.3``) passes them, and two runs of one config then differ. So at every
commit one state of the rows being committed is checked again: the most extreme one (the
largest ``max |x|``), where such branches hide:

* a log-probability model is evaluated again there and must give the stored log-probability
  (to ``REL_TOLERANCE``: a single-row batch may change the last bits of a vectorised model;
  a different source of randomness changes far more); ``-inf`` must stay ``-inf``;
* a user kernel is run twice from that state with two copies of one random stream (the run's
  own streams are untouched) and must return the same new state bit for bit.

The cost is bounded: a check is skipped while the time spent checking exceeds
``BUDGET`` (2 %) of the run's sampling time so far. What is not caught: randomness in
states no check happens to look at, and randomness that leaves the result unchanged.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.errors import ModelError

__all__ = ["BUDGET", "REL_TOLERANCE", "LaterStepCheck"]

#: the share of the sampling time the checks may take
BUDGET = 0.02
#: relative difference of a log-probability evaluated again that counts as non-determinism
REL_TOLERANCE = 1e-9


class LaterStepCheck:
    """Called at every commit with the rows being committed (see the module docstring).

    Parameters
    ----------
    model : LoadedModel
        The guarded evaluator (its ``param_names`` name the values in messages).
    driver : SamplerDriver
        The run's driver; a kernel driver offers ``step_twice(x)``.
    """

    def __init__(self, model: Any, driver: Any) -> None:
        self._model = model
        self._twice = getattr(driver, "step_twice", None)
        self._t0 = time.monotonic()
        self._spent = 0.0
        #: checks run and skipped (for tests and the docs' figures)
        self.done = 0
        self.skipped = 0

    def __call__(self, position: NDArray[np.float64], log_prob: NDArray[np.float64]) -> None:
        """Check the most extreme state of ``position`` (rows, walkers, params)."""
        if position.size == 0:
            return
        start = time.monotonic()
        if self._spent > BUDGET * (start - self._t0):
            self.skipped += 1
            return
        flat = position.reshape(-1, position.shape[-1])
        k = int(np.argmax(np.abs(flat).max(axis=1)))
        x = np.array(flat[k], dtype=np.float64)
        try:
            if self._twice is not None:
                self._kernel(x)
            else:
                self._log_prob(x, float(log_prob.reshape(-1)[k]))
        finally:
            self._spent += time.monotonic() - start
            self.done += 1

    def _where(self, x: NDArray[np.float64]) -> str:
        return ", ".join(f"{n}={v:.6g}" for n, v in zip(self._model.param_names, x, strict=True))

    def _log_prob(self, x: NDArray[np.float64], stored: float) -> None:
        out = np.asarray(self._model(x[None, :]), dtype=np.float64)
        again = float(out[0] if out.ndim == 1 else out[0, 0])
        if again == stored or (np.isnan(again) and np.isnan(stored)):
            return
        scale = REL_TOLERANCE * max(abs(again), abs(stored), 1.0)
        if np.isfinite(again) and np.isfinite(stored) and abs(again - stored) <= scale:
            return
        raise ModelError(
            f"log_prob is not deterministic: at {self._where(x)} it gave {stored!r} during the "
            f"run and {again!r} when evaluated again; log_prob must be a pure function of "
            "theta and data (no numpy global RNG, clock or mutable state); the store keeps "
            "its last commit, which may already hold draws that cannot be reproduced"
        )

    def _kernel(self, x: NDArray[np.float64]) -> None:
        assert self._twice is not None
        first, second = self._twice(x)
        if np.asarray(first).tobytes() == np.asarray(second).tobytes():
            return
        raise ModelError(
            f"sampler.kernel is not reproducible: from {self._where(x)}, two runs with the "
            f"same random state gave ({self._where(np.asarray(first))}) and "
            f"({self._where(np.asarray(second))}); all randomness must come from the rng "
            "argument (no numpy global RNG, random module or clock); the store keeps its "
            "last commit, which may already hold draws that cannot be reproduced"
        )
