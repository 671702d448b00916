"""Loading the user's log-probability function, data and loader.

Importing user code is guarded like calling it: anything the module does instead of
importing (an exception, ``sys.exit``, ``KeyboardInterrupt`` raised by the code itself) is a
:class:`~chainyard.errors.ConfigError` naming the file. The guarded evaluator that calls the
model lives in :mod:`chainyard.evaluator` (:class:`LoadedModel`, re-exported here).
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from chainyard.config import RunConfig
from chainyard.datafiles import read_data_file
from chainyard.errors import ConfigError
from chainyard.evaluator import LoadedModel, describe_exception, watch_sigint
from chainyard.evaluator.interrupts import _is_real_ctrl_c, _is_stop_signal

__all__ = [
    "LoadedModel",
    "check_extra_sources",
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
    watch_sigint()  # a real Ctrl-C stays one; the module's own KeyboardInterrupt is an error
    module_name, func_name = _split_reference(ref)
    is_file = module_name.endswith(".py") or "/" in module_name or "\\" in module_name
    if is_file:
        path = resolve_source(ref, base_dir)
        assert path is not None
        if path.is_dir():
            raise ConfigError(f"{field}: {path} is a directory; expected a Python file")
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
        except BaseException as exc:  # the user's module failed to import
            sys.modules.pop(unique, None)
            raise _import_error(exc, f"{field}: importing {path} failed") from None
        finally:
            sys.path.remove(str(path.parent))
        where = str(path)
    else:
        try:
            module = importlib.import_module(module_name)
        except BaseException as exc:
            raise _import_error(exc, f"{field}: cannot import module {module_name!r}") from None
        where = module_name
    func = getattr(module, func_name, None)
    if func is None:
        raise ConfigError(f"{field}: {where} has no function {func_name!r}")
    if not callable(func):
        raise ConfigError(f"{field}: {where}:{func_name} is not callable")
    return func  # type: ignore[no-any-return]


def _import_error(exc: BaseException, prefix: str) -> ConfigError:
    """The one-line error for user code that did not import; re-raise chainyard's stop
    signal and a real Ctrl-C."""
    if _is_stop_signal(exc) or _is_real_ctrl_c(exc):
        raise exc
    what, hint = describe_exception(exc)
    if isinstance(exc, SystemExit):
        hint = "user code must not exit"
    elif isinstance(exc, KeyboardInterrupt):
        hint = "user code must not raise KeyboardInterrupt"
    return ConfigError(f"{prefix}: {what}" + (f"; {hint}" if hint else ""))


def load_data(config: RunConfig) -> Any:
    """Load the configured data file (None when none is configured).

    The formats and their rules are those of :func:`chainyard.datafiles.read_data_file`.
    A configured ``data_loader`` is called as ``loader(path)`` instead; anything it raises
    (including ``sys.exit``) is a ConfigError naming the file.
    """
    spec = config.model
    if spec.data is None:
        if spec.data_loader is not None:
            raise ConfigError("model.data_loader: set but model.data is not")
        return None
    path = config.resolve(spec.data)
    if path.is_dir():
        raise ConfigError(f"model.data: {path} is a directory; expected a data file")
    if not path.is_file():
        raise ConfigError(f"model.data: data file not found: {path}")
    if spec.data_loader is not None:
        loader = load_function(spec.data_loader, config.base_dir, "model.data_loader")
        try:
            return loader(path)
        except BaseException as exc:
            raise _import_error(exc, f"model.data_loader: failed on {path}") from None
    return read_data_file(path)


def load_model(config: RunConfig) -> LoadedModel:
    """Import the model function and load the data named by ``config``.

    Raises
    ------
    ConfigError
        If a file, module or function is missing or fails to load.
    """
    watch_sigint()
    func = load_function(config.model.log_prob, config.base_dir, "model.log_prob")
    check_extra_sources(config)
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
        walkers=config.sampler.walkers,
        call_time_limit=config.model.call_time_limit_seconds,
        blob_names=tuple(config.sampler.blobs),
    )


def check_extra_sources(config: RunConfig) -> None:
    """Every ``model.extra_sources`` entry must be an existing file (its hash is recorded).

    Raises
    ------
    ConfigError
        Naming the entry and the path it resolved to.
    """
    for k, src in enumerate(config.model.extra_sources):
        path = config.resolve(src)
        if path.is_dir():
            raise ConfigError(
                f"model.extra_sources[{k}] = {src!r}: {path} is a directory; list files"
            )
        if not path.is_file():
            raise ConfigError(f"model.extra_sources[{k}] = {src!r}: file not found: {path}")
