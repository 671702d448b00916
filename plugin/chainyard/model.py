"""Loading the user's log-probability function, data and loader; the guarded evaluator.

The evaluator wraps the user's function so that the sampler only ever sees well-formed
output: parameters outside their bounds get -inf without calling the model, NaN results and
exceptions become a :class:`~chainyard.errors.ModelError` naming the parameter values, and
non-vectorised models are looped over walkers.
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import sys
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.config import RunConfig
from chainyard.datafiles import read_data_file
from chainyard.errors import ConfigError, ModelError

__all__ = [
    "LoadedModel",
    "file_sha256",
    "load_data",
    "load_function",
    "load_model",
    "resolve_source",
]


def file_sha256(path: Path) -> str:
    """SHA-256 (hex) of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _split_reference(ref: str) -> tuple[str, str]:
    module, _, func = ref.rpartition(":")
    return module, func


def resolve_source(ref: str, base_dir: Path) -> Path | None:
    """The source file a function reference points at (None if it has no file)."""
    module, _ = _split_reference(ref)
    if module.endswith(".py") or "/" in module or "\\" in module:
        p = Path(module)
        return p if p.is_absolute() else base_dir / p
    spec = importlib.util.find_spec(module)
    if spec is None or spec.origin in (None, "built-in", "frozen"):
        return None
    return Path(spec.origin)


def load_function(ref: str, base_dir: Path, field: str) -> Callable[..., Any]:
    """Import the function named by ``ref`` ('file.py:func' or 'package.module:func').

    Parameters
    ----------
    ref : str
        The reference as written in the config.
    base_dir : Path
        Directory relative file paths are resolved against.
    field : str
        Config field name, used in error messages.

    Raises
    ------
    ConfigError
        If the file or module is missing, fails to import, or lacks the function.
    """
    module_name, func_name = _split_reference(ref)
    is_file = module_name.endswith(".py") or "/" in module_name or "\\" in module_name
    if is_file:
        path = resolve_source(ref, base_dir)
        assert path is not None
        if not path.is_file():
            raise ConfigError(f"{field}: model file not found: {path}")
        digest = hashlib.sha256(str(path.resolve()).encode()).hexdigest()[:16]
        unique = f"_chainyard_user_{path.stem}_{digest}"
        spec = importlib.util.spec_from_file_location(unique, path)
        if spec is None or spec.loader is None:
            raise ConfigError(f"{field}: cannot import {path}")
        module = importlib.util.module_from_spec(spec)
        # let the module import helpers that sit beside it
        sys.path.insert(0, str(path.parent))
        try:
            sys.modules[unique] = module
            spec.loader.exec_module(module)
        except Exception as exc:  # the user's module failed to import
            sys.modules.pop(unique, None)
            raise ConfigError(
                f"{field}: importing {path} failed: {type(exc).__name__}: {exc}"
            ) from None
        finally:
            sys.path.remove(str(path.parent))
        where = str(path)
    else:
        try:
            module = importlib.import_module(module_name)
        except Exception as exc:
            raise ConfigError(
                f"{field}: cannot import module {module_name!r}: {type(exc).__name__}: {exc}"
            ) from None
        where = module_name
    func = getattr(module, func_name, None)
    if func is None:
        raise ConfigError(f"{field}: {where} has no function {func_name!r}")
    if not callable(func):
        raise ConfigError(f"{field}: {where}:{func_name} is not callable")
    return func  # type: ignore[no-any-return]


def load_data(config: RunConfig) -> Any:
    """Load the configured data file (None when none is configured).

    CSV: a header row, then rows; returns a dict of column name -> 1-D array (float64 where
    every value parses as a number, else str). NPZ: dict of name -> array (no pickle).
    JSON: the parsed document, with numeric lists turned into float64 arrays.
    A configured ``data_loader`` is called as ``loader(path)`` instead.
    """
    spec = config.model
    if spec.data is None:
        if spec.data_loader is not None:
            raise ConfigError("model.data_loader: set but model.data is not")
        return None
    path = config.resolve(spec.data)
    if not path.is_file():
        raise ConfigError(f"model.data: data file not found: {path}")
    if spec.data_loader is not None:
        loader = load_function(spec.data_loader, config.base_dir, "model.data_loader")
        try:
            return loader(path)
        except Exception as exc:
            raise ConfigError(
                f"model.data_loader: failed on {path}: {type(exc).__name__}: {exc}"
            ) from None
    return read_data_file(path)


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
    """

    func: Callable[..., Any]
    data: Any
    vectorized: bool
    lower: NDArray[np.float64]
    upper: NDArray[np.float64]
    param_names: tuple[str, ...]
    n_blobs: int

    def _describe(self, theta: NDArray[np.float64]) -> str:
        return ", ".join(f"{n}={v:.6g}" for n, v in zip(self.param_names, theta, strict=True))

    def _fail(self, theta: NDArray[np.float64], what: str) -> ModelError:
        return ModelError(f"log_prob {what} at {self._describe(theta)}")

    def _split_scalar(self, out: Any, theta: NDArray[np.float64]) -> tuple[float, list[float]]:
        if self.n_blobs:
            if not isinstance(out, tuple | list) or len(out) != 1 + self.n_blobs:
                raise self._fail(
                    theta,
                    f"must return a tuple (log_prob, {self.n_blobs} blob value(s)); "
                    f"got {type(out).__name__}",
                )
            lp, blobs = out[0], list(out[1:])
        else:
            lp, blobs = out, []
        try:
            value = float(lp)
            blob_values = [float(b) for b in blobs]
        except (TypeError, ValueError):
            raise self._fail(theta, f"returned a non-number ({_short(lp)})") from None
        return value, blob_values

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
        if self.n_blobs == 0 and not self.bounded:
            lp = (
                self._call_vectorized_plain(thetas) if self.vectorized else self._loop_plain(thetas)
            )
            # a sum that is NaN or +inf flags any NaN or +inf (or a finite overflow) in one
            # cheap pass; the exact check runs only then
            if not np.add.reduce(lp) < np.inf and not (lp < np.inf).all():
                self._raise_bad(thetas, lp)
            return lp
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
                    theta = thetas[i]
                    try:
                        result = self.func(theta, self.data)
                    except ModelError:
                        raise
                    except Exception as exc:
                        raise self._fail(theta, f"raised {type(exc).__name__}: {exc}") from None
                    out[i, 0], out[i, 1:] = self._split_scalar(result, theta)
        if not (out[:, 0] < np.inf).all():
            self._raise_bad(thetas, out[:, 0])
        return out[:, 0] if self.n_blobs == 0 else out

    def __post_init__(self) -> None:
        self.bounded = bool(np.isfinite(self.lower).any() or np.isfinite(self.upper).any())
        """Whether any parameter has a finite bound (outside them: -inf, model not called)."""

    def _raise_bad(self, thetas: NDArray[np.float64], lp: NDArray[np.float64]) -> None:
        nan = np.flatnonzero(np.isnan(lp))
        if nan.size:
            raise self._fail(thetas[nan[0]], "returned NaN")
        raise self._fail(thetas[np.flatnonzero(lp == np.inf)[0]], "returned +inf")

    def _loop_plain(self, thetas: NDArray[np.float64]) -> NDArray[np.float64]:
        """Fast path: one call per walker, no bounds, no blobs."""
        f, data = self.func, self.data
        lp = np.empty(thetas.shape[0])
        for i in range(thetas.shape[0]):
            theta = thetas[i]
            try:
                value = f(theta, data)
            except Exception as exc:
                raise self._fail(theta, f"raised {type(exc).__name__}: {exc}") from None
            try:
                lp[i] = value
            except (TypeError, ValueError):
                raise self._fail(theta, f"returned a non-number ({_short(value)})") from None
        return lp

    def _call_vectorized_plain(self, thetas: NDArray[np.float64]) -> NDArray[np.float64]:
        """Fast path: all walkers in one call, no bounds, no blobs."""
        try:
            result = self.func(thetas, self.data)
        except Exception as exc:
            raise self._fail(thetas[0], f"raised {type(exc).__name__}: {exc}") from None
        try:
            lp = np.asarray(result, dtype=np.float64).reshape(-1)
        except (TypeError, ValueError):
            raise self._fail(thetas[0], "returned a non-numeric array") from None
        if lp.shape != (thetas.shape[0],):
            raise self._fail(
                thetas[0],
                f"(vectorized) must return shape ({thetas.shape[0]},), got {np.shape(result)}",
            )
        return lp

    def _call_vectorized(
        self, thetas: NDArray[np.float64], idx: NDArray[np.intp], out: NDArray[np.float64]
    ) -> None:
        sub = thetas[idx]
        try:
            result = self.func(sub, self.data)
        except Exception as exc:
            raise self._fail(sub[0], f"raised {type(exc).__name__}: {exc}") from None
        parts = list(result) if self.n_blobs and isinstance(result, tuple | list) else [result]
        if len(parts) != 1 + self.n_blobs:
            raise self._fail(sub[0], f"must return {1 + self.n_blobs} arrays (log_prob and blobs)")
        for j, part in enumerate(parts):
            try:
                arr = np.asarray(part, dtype=np.float64).reshape(-1)
            except (TypeError, ValueError):
                raise self._fail(sub[0], "returned a non-numeric array") from None
            if arr.shape != (idx.size,):
                raise self._fail(
                    sub[0],
                    f"(vectorized) must return shape ({idx.size},), got {np.shape(part)}",
                )
            out[idx, j] = arr


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def load_model(config: RunConfig) -> LoadedModel:
    """Import the model function and load the data named by ``config``.

    Raises
    ------
    ConfigError
        If a file, module or function is missing or fails to load.
    """
    func = load_function(config.model.log_prob, config.base_dir, "model.log_prob")
    data = load_data(config)
    lower = np.array(
        [
            (-np.inf if p.bounds is None or p.bounds[0] is None else p.bounds[0])
            for p in config.parameters
        ],
        dtype=np.float64,
    )
    upper = np.array(
        [
            (np.inf if p.bounds is None or p.bounds[1] is None else p.bounds[1])
            for p in config.parameters
        ],
        dtype=np.float64,
    )
    return LoadedModel(
        func=func,
        data=data,
        vectorized=config.model.vectorized,
        lower=lower,
        upper=upper,
        param_names=config.param_names,
        n_blobs=len(config.sampler.blobs),
    )
