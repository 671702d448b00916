"""Initial walker positions: drawn from each parameter's ``init`` or read from a file."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from chainyard.config import NormalInit, RunConfig, UniformInit
from chainyard.errors import ConfigError
from chainyard.model import LoadedModel
from chainyard.streams import init_generator

__all__ = ["initial_state"]


def _draw(config: RunConfig, rng: np.random.Generator, n: int) -> NDArray[np.float64]:
    cols = []
    for p in config.parameters:
        if isinstance(p.init, NormalInit):
            cols.append(p.init.normal.loc + p.init.normal.scale * rng.standard_normal(n))
        elif isinstance(p.init, UniformInit):
            cols.append(rng.uniform(p.init.uniform.low, p.init.uniform.high, n))
        else:  # pragma: no cover - validated by the config
            raise ConfigError(f"parameters.{p.name}.init: missing")
    return np.column_stack(cols).astype(np.float64)


def _read_positions(config: RunConfig) -> NDArray[np.float64]:
    assert config.sampler.initial_positions is not None
    path = config.resolve(config.sampler.initial_positions)
    if not path.is_file():
        raise ConfigError(f"sampler.initial_positions: file not found: {path}")
    try:
        if path.suffix.lower() == ".npy":
            arr = np.load(path, allow_pickle=False)
        elif path.suffix.lower() == ".csv":
            arr = np.loadtxt(path, delimiter=",", ndmin=2)
        else:
            raise ConfigError(
                f"sampler.initial_positions: {path.name}: unsupported type; allowed: .npy, .csv"
            )
    except ConfigError:
        raise
    except Exception as exc:
        raise ConfigError(f"sampler.initial_positions: cannot read {path}: {exc}") from None
    want = (config.sampler.walkers, len(config.parameters))
    if arr.shape != want:
        raise ConfigError(
            f"sampler.initial_positions: {path.name} has shape {arr.shape}; need "
            f"(walkers, params) = {want}"
        )
    arr = np.asarray(arr, dtype=np.float64)
    bad = np.argwhere(~np.isfinite(arr))
    if bad.size:
        row, col = (int(v) for v in bad[0])
        raise ConfigError(
            f"sampler.initial_positions: {path.name}: walker {row}, parameter "
            f"{config.parameters[col].name} is {arr[row, col]}; every start must be a finite "
            "number"
        )
    return arr


def initial_state(
    config: RunConfig, model: LoadedModel, replica: int
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], int]:
    """Start positions and their log-probabilities, with retries for -inf starts.

    Walkers whose start has log-probability -inf are redrawn (all coordinates, from the
    replica's init stream) up to ``sampler.init_retries`` times.

    Returns
    -------
    position : ndarray, shape (walkers, params)
    log_prob : ndarray, shape (walkers,)
    blobs : ndarray, shape (walkers, n_blobs)
    redraws : int
        Number of walker redraws that were needed.

    Raises
    ------
    ConfigError
        If walkers still start at -inf after the retries (or a file start is at -inf).
    """
    n = config.sampler.walkers
    from_file = config.sampler.initial_positions is not None
    rng = init_generator(config.seed, replica)
    pos = _read_positions(config) if from_file else _draw(config, rng, n)
    out = _evaluate(model, pos)
    redraws = 0
    retries = 0 if from_file else config.sampler.init_retries
    for _ in range(retries):
        bad = np.flatnonzero(~np.isfinite(out[:, 0]))
        if bad.size == 0:
            break
        pos[bad] = _draw(config, rng, bad.size)
        out[bad] = _evaluate(model, pos[bad])
        redraws += int(bad.size)
    bad = np.flatnonzero(~np.isfinite(out[:, 0]))
    if bad.size:
        where = "sampler.initial_positions" if from_file else "parameters[*].init"
        what = "all" if bad.size == n else f"{bad.size} of {n}"
        extra = "" if from_file else f" after {retries} redraws"
        raise ConfigError(
            f"{where}: {what} walkers start where log_prob is -inf{extra}; move the starting "
            "region inside the model's support (check init, bounds and the model)"
        )
    return pos, out[:, 0].copy(), out[:, 1:].copy(), redraws


def _evaluate(model: LoadedModel, pos: NDArray[np.float64]) -> NDArray[np.float64]:
    res = model(pos)
    return res.reshape(len(pos), -1) if res.ndim == 1 else res
