"""User-written transition kernels (e.g. Gibbs sweeps) on independent chains.

The kernel is ``step(state, rng, data)``: ``state`` is a copy of one chain's parameter
vector, shape (params,), ``rng`` that chain's own ``numpy.random.Generator`` and ``data``
the model's data. It returns the new state, or ``(state, log_prob)``; chainyard evaluates
the model for every chain whose log-probability was not returned (one call for all of them),
so every stored state has its log-probability. ``accepted`` records whether the state moved.

All randomness must come from ``rng``: a chain is then a pure function of its start and its
stream, and resume is exact. At the first commit of every run the first steps of chain 0 are
taken again from the recorded start and stream state and compared bit for bit
(:meth:`KernelDriver.check_reproducible`); a kernel that also draws from elsewhere (numpy's
global generator, ``random``, the clock) is stopped there with a model error.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.config import KernelSpec, RunConfig
from chainyard.engine.chains import (
    check_chain_states,
    fresh_chain_states,
    generator_from_json,
    generator_to_json,
    generators_from_json,
)
from chainyard.engine.protocol import StepBlock, StepRows
from chainyard.engine.registry import SamplerKind, register
from chainyard.errors import ConfigError, ModelError
from chainyard.evaluator import describe_exception
from chainyard.evaluator.interrupts import _is_real_ctrl_c, _is_stop_signal
from chainyard.model import LoadedModel, load_function

__all__ = ["CHECK_STEPS", "KIND", "KernelDriver", "initial_kernel_state", "load_kernel"]

#: steps of chain 0 taken again at the first commit to check the kernel's randomness
CHECK_STEPS = 3


def load_kernel(config: RunConfig) -> Callable[..., Any]:
    """Import ``sampler.kernel`` the way the model's log_prob is imported."""
    spec = config.sampler
    assert isinstance(spec, KernelSpec)
    try:
        return load_function(spec.kernel, config.base_dir, "sampler.kernel")
    except ConfigError as exc:
        raise exc.located(config.source) from None


def initial_kernel_state(spec: KernelSpec, seed: int, replica: int) -> dict[str, Any]:
    """The driver record before the first step (fresh per-chain streams)."""
    return {
        "sampler": "kernel",
        "bit_generator": "PCG64",
        "chains": fresh_chain_states(seed, replica, spec.chains),
    }


class KernelDriver:
    """Steps a user kernel on independent chains.

    Parameters
    ----------
    model : LoadedModel
        The guarded log-probability evaluator (for states without a returned log_prob).
    kernel : callable
        ``step(state, rng, data) -> state | (state, log_prob)``.
    spec : KernelSpec
        The sampler settings.
    position : ndarray, shape (chains, params)
    log_prob : ndarray, shape (chains,)
        The state after the last stored step.
    random_state : dict
        The driver record (:func:`initial_kernel_state` or a commit's).
    step : int
        Steps already taken.
    """

    kind = "chainyard.kernel"

    def __init__(
        self,
        model: LoadedModel,
        kernel: Callable[..., Any],
        spec: KernelSpec,
        position: NDArray[np.float64],
        log_prob: NDArray[np.float64],
        random_state: dict[str, Any],
        step: int,
    ) -> None:
        chains, self._n_params = position.shape
        self._model = model
        self._kernel = kernel
        self._name = spec.kernel
        self._gens = generators_from_json(random_state.get("chains"), chains)
        self._x = np.array(position, dtype=np.float64)
        self._lp = np.array(log_prob, dtype=np.float64)
        self._step = int(step)
        self._no_blobs = np.empty((chains, 0))
        # what the reproducibility check starts from, and the rows it must match
        self._check_from = (self._x[0].copy(), dict(random_state["chains"][0]), self._step)
        self._check_rows: list[NDArray[np.float64]] = []
        self._check = spec.check_rng

    def _call(self, x: NDArray[np.float64], gen: np.random.Generator, chain: int, step: int) -> Any:
        try:
            return self._kernel(x.copy(), gen, self._model.data)
        except BaseException as exc:
            raise self._failed(exc, x, chain, step) from None

    def _failed(
        self, exc: BaseException, x: NDArray[np.float64], chain: int, step: int
    ) -> ModelError:
        """The one-line error for an exception from the kernel (a stop signal or a real
        Ctrl-C is re-raised as it is)."""
        if _is_stop_signal(exc) or _is_real_ctrl_c(exc):
            raise exc
        what, hint = describe_exception(exc)
        return ModelError(
            f"sampler.kernel {self._name} raised {what} at step {step}, chain {chain} "
            f"({self._values(x)})" + (f": {hint}" if hint else "")
        )

    def _values(self, x: NDArray[np.float64]) -> str:
        return ", ".join(f"{n}={v:.6g}" for n, v in zip(self._model.param_names, x, strict=True))

    def _parse(self, out: Any, chain: int, step: int) -> tuple[NDArray[np.float64], float | None]:
        if type(out) is np.ndarray and out.shape == (self._n_params,) and out.dtype == np.float64:
            return out, None  # the common case; finiteness is checked for all chains at once
        lp: float | None = None
        if isinstance(out, tuple):
            if len(out) != 2:
                raise ModelError(
                    f"sampler.kernel {self._name} returned a tuple of {len(out)} at step {step}, "
                    f"chain {chain}; return the new state, or (state, log_prob)"
                )
            out, lp_raw = out
            try:
                lp = float(lp_raw)
            except (TypeError, ValueError):
                raise ModelError(
                    f"sampler.kernel {self._name} returned log_prob {lp_raw!r} at step {step}, "
                    f"chain {chain}; it must be a number"
                ) from None
        try:
            x = np.asarray(out, dtype=np.float64)
        except (TypeError, ValueError):
            x = np.empty(0)
        if x.shape != (self._n_params,):
            self._bad_state(out, chain, step)
        if lp is not None and (np.isnan(lp) or lp == np.inf):
            raise ModelError(
                f"sampler.kernel {self._name} returned log_prob {lp!r} at step {step}, chain "
                f"{chain}; it must be a number below +inf"
            )
        return x, lp

    def _bad_state(self, out: Any, chain: int, step: int) -> None:
        raise ModelError(
            f"sampler.kernel {self._name} returned {str(out)[:60]!r} at step {step}, chain "
            f"{chain}; the state must be {self._n_params} finite numbers (params,)"
        )

    def steps(self, n: int) -> Iterator[StepRows]:
        """Advance ``n`` steps; see :class:`chainyard.engine.protocol.SamplerDriver`."""
        gens, x, lp = self._gens, self._x, self._lp
        chains = x.shape[0]
        new = np.empty_like(x)
        missing = np.zeros(chains, dtype=bool)
        for _ in range(n):
            for c, g in enumerate(gens):
                new[c], given = self._parse(self._call(x[c], g, c, self._step), c, self._step)
                missing[c] = given is None
                if given is not None:
                    lp[c] = given
            total = float(np.add.reduce(new, axis=None))  # exact check only if not finite
            if not -np.inf < total < np.inf and not np.isfinite(new).all():
                c = int(np.flatnonzero(~np.isfinite(new).all(axis=1))[0])
                self._bad_state(new[c], c, self._step)
            if missing.all():
                out = self._model(new)
                lp[:] = out if out.ndim == 1 else out[:, 0]
            elif missing.any():
                out = self._model(new[missing])
                lp[missing] = out if out.ndim == 1 else out[:, 0]
            accepted = (new != x).any(axis=1)
            x[:] = new
            self._step += 1
            if self._check and len(self._check_rows) < CHECK_STEPS:
                self._check_rows.append(x[0].copy())
            yield StepRows(x, lp, accepted, self._no_blobs)

    def fill(self, block: StepBlock, a: int, b: int) -> None:
        """Take steps ``a .. b - 1`` into rows ``a .. b - 1`` of the run loop's buffer: the
        draws of :meth:`steps`, with the new states written straight into the buffer."""
        gens, kernel, data, n_params = self._gens, self._kernel, self._model.data, self._n_params
        call = self._model.checked
        position, log_prob, accepted, _ = block
        prev, prev_lp = self._x, self._lp
        chains = prev.shape[0]
        missing = np.zeros(chains, dtype=bool)
        shape = (n_params,)
        for k in range(a, b):
            new, lp = position[k], log_prob[k]
            lp[...] = prev_lp
            some_given = False  # the mask below is needed only if a kernel gave a log-prob
            for c, g in enumerate(gens):
                try:
                    out = kernel(prev[c].copy(), g, data)
                except BaseException as exc:
                    raise self._failed(exc, prev[c], c, self._step) from None
                if type(out) is np.ndarray and out.shape == shape and out.dtype == np.float64:
                    new[c] = out
                    missing[c] = True
                    continue
                new[c], given = self._parse(out, c, self._step)
                missing[c] = given is None
                if given is not None:
                    lp[c] = given
                    some_given = True
            total = float(np.add.reduce(new, axis=None))  # exact check only if not finite
            if not -np.inf < total < np.inf and not np.isfinite(new).all():
                c = int(np.flatnonzero(~np.isfinite(new).all(axis=1))[0])
                self._bad_state(new[c], c, self._step)
            if not some_given:
                res = call(new)
                lp[...] = res if res.ndim == 1 else res[:, 0]
            elif missing.any():
                res = self._model(new[missing])
                lp[missing] = res if res.ndim == 1 else res[:, 0]
            np.not_equal(new, prev).any(axis=1, out=accepted[k])
            self._step += 1
            if self._check and len(self._check_rows) < CHECK_STEPS:
                self._check_rows.append(new[0].copy())
            prev, prev_lp = new, lp
        self._x[...] = prev
        self._lp[...] = prev_lp

    def check_reproducible(self) -> None:
        """Take the first steps of chain 0 again from the recorded start and compare bitwise.

        Raises
        ------
        ModelError
            If a state differs: the kernel drew randomness from outside its ``rng``.
        """
        if not self._check or not self._check_rows:
            return
        x, rng_record, step = self._check_from
        gen = generator_from_json(rng_record)
        for k, want in enumerate(self._check_rows):
            again, _ = self._parse(self._call(x, gen, 0, step + k), 0, step + k)
            again = np.array(again, dtype=np.float64)
            if again.tobytes() != want.tobytes():
                raise ModelError(
                    f"sampler.kernel {self._name} is not reproducible: step {step + k} of chain "
                    f"0 gave ({self._values(want)}) and, run again from the same state and "
                    f"random state, ({self._values(again)}); all randomness must come from the "
                    "rng argument (no numpy global RNG, random module or clock); nothing was "
                    "committed by this run"
                )
            x = again
        self._check = False

    def step_twice(self, x: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """One kernel step from ``x``, twice, each with its own copy of chain 0's stream (the
        run's streams are untouched); equal for a kernel whose randomness is all its rng's."""
        record = generator_to_json(self._gens[0])
        out = []
        for _ in range(2):
            new, _lp = self._parse(
                self._call(x, generator_from_json(record), 0, self._step), 0, self._step
            )
            out.append(np.array(new, dtype=np.float64))
        return out[0], out[1]

    def random_state(self) -> dict[str, Any]:
        """Every chain's stream as JSON."""
        return {
            "sampler": "kernel",
            "bit_generator": "PCG64",
            "chains": [generator_to_json(g) for g in self._gens],
        }


def _make_driver(
    config: RunConfig,
    model: LoadedModel,
    position: NDArray[np.float64],
    log_prob: NDArray[np.float64],
    blobs: NDArray[np.float64],
    random_state: dict[str, Any],
    step: int,
) -> KernelDriver:
    return KernelDriver(
        model, load_kernel(config), config.sampler, position, log_prob, random_state, step
    )


def _preflight(config: RunConfig) -> str:
    load_kernel(config)  # a missing file or function: exit 2 before anything is written
    return f"kernel {config.sampler.kernel} loaded"


KIND = register(
    SamplerKind(
        name="kernel",
        identity=KernelDriver.kind,
        axis="chains",
        independent_draws=False,
        engine_blobs=(),
        initial_random_state=lambda config, replica: initial_kernel_state(
            config.sampler, config.seed, replica
        ),
        make_driver=_make_driver,
        check_random_state=check_chain_states,
        preflight=_preflight,
    )
)
