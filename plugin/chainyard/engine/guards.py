"""Checks the run loop makes before and while it writes: what is at the store path, whether
the model is deterministic, and how a refused write is reported.
"""

from __future__ import annotations

import errno
import json
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.errors import ModelError, StorageFaultError, StoreError
from chainyard.model import LoadedModel
from chainyard.store.faults import as_storage_fault
from chainyard.store.layout import ATTRS_KEY, COMMIT_FILE, DRAWS

__all__ = [
    "check_deterministic",
    "committed_steps",
    "enclosing_store",
    "path_state",
    "refuse_inside_store",
    "refuse_uncommitted",
    "storage_fault",
    "with_last_commit",
]


def _has_chainyard_attrs(path: Path) -> bool:
    try:
        with (path / "zarr.json").open("rb") as f:
            raw = f.read(2**20 + 1)
        meta = json.loads(raw) if len(raw) <= 2**20 else None
    except (OSError, ValueError):
        return False
    attrs = meta.get("attributes") if isinstance(meta, dict) else None
    return isinstance(attrs, dict) and isinstance(attrs.get(ATTRS_KEY), dict)


def enclosing_store(path: Path) -> Path | None:
    """The nearest folder above ``path`` (resolved) that is a chainyard store, if any."""
    for parent in Path(path).resolve().parents:
        if (parent / COMMIT_FILE).exists() or _has_chainyard_attrs(parent):
            return parent
    return None


def refuse_inside_store(out: Path, what: str) -> None:
    """Refuse (exit 4) to write ``what`` at ``out`` inside an existing chainyard store.

    Raises
    ------
    StoreError
        Naming the enclosing store.
    """
    home = enclosing_store(out)
    if home is not None:
        raise StoreError(
            f"{out}: is inside the chainyard store {home}; write the {what} outside any store"
        )


def _holds_data_chunks(path: Path) -> bool:
    draws = path / DRAWS
    if not draws.is_dir():
        return False
    return any(p.name != "zarr.json" for p in draws.rglob("*") if not p.is_dir())


def path_state(path: Path) -> str:
    """What is at a store path, for deciding whether it may be created, resumed or cleaned.

    Returns
    -------
    str
        ``"missing"``; ``"file"`` (not a folder); ``"committed"`` (a commit record is there,
        readable or not); ``"unfinished"`` (an empty folder, or a store whose creation was cut
        short: chainyard attributes and no draws chunk files; never committed a row, safe to
        clean up); ``"uncommitted-data"`` (chainyard attributes and draws chunk files but no
        commit record: never touched without ``--restart``); ``"foreign"`` (anything else).
    """
    if not path.exists() and not path.is_symlink():
        return "missing"
    if not path.is_dir():
        return "file"
    if (path / COMMIT_FILE).exists() or (path / COMMIT_FILE).is_symlink():
        return "committed"
    if not any(path.iterdir()):
        return "unfinished"
    if not _has_chainyard_attrs(path):
        return "foreign"
    return "uncommitted-data" if _holds_data_chunks(path) else "unfinished"


def refuse_uncommitted(path: Path) -> StoreError:
    """The error for a store with chunk files but no commit record (never cleaned up)."""
    return StoreError(
        f"{path}: holds sampled chunk files but no commit record ({COMMIT_FILE} is missing); "
        "refusing to resample over it. Use --restart (restart=True) to discard it and start "
        "over"
    )


def committed_steps(path: Path) -> int | None:
    """The committed step count read from ``path/commit.json`` (None if there is none)."""
    try:
        with (path / COMMIT_FILE).open("rb") as f:
            raw = f.read(2**26)
        steps = json.loads(raw).get("steps_done")
    except (OSError, ValueError, AttributeError):
        return None
    return steps if isinstance(steps, int) and not isinstance(steps, bool) else None


def storage_fault(exc: OSError, path: Path, steps: int | None) -> StorageFaultError:
    """One-line :class:`StorageFaultError` for a refused read or write.

    Worded as the store's own write sites word it (:mod:`chainyard.store.faults`), so every
    storage fault reads alike whichever layer met it.

    Parameters
    ----------
    exc : OSError
        The system error (its file name is used when it has one).
    path : Path
        The store (named when the error has no file name).
    steps : int or None
        The store's last committed step (None: there is no commit).
    """
    fault = as_storage_fault(exc, path, committed=steps)
    if fault is not None:
        return fault
    name = errno.errorcode.get(exc.errno or 0, str(exc.errno))
    return StorageFaultError(
        f"{exc.filename or path}: the file system refused ({exc.strerror or exc} [{name}]); "
        + _after(steps)
    )


def _after(steps: int | None) -> str:
    if steps is None:
        return "nothing was committed"
    return f"the last commit (step {steps}) is intact"


def with_last_commit(exc: StorageFaultError, steps: int | None) -> StorageFaultError:
    """``exc`` as one line that states the store's last commit (added if it does not)."""
    text = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    if "last commit" in text or "nothing was committed" in text:
        return StorageFaultError(text)
    return StorageFaultError(f"{text}; {_after(steps)}")


def check_deterministic(
    model: LoadedModel,
    position: NDArray[np.float64],
    log_prob: NDArray[np.float64],
    blobs: NDArray[np.float64],
) -> None:
    """Evaluate the model again at the stored start positions and compare bitwise.

    The whole ensemble is evaluated in one batch, as at the start (so vectorised models see
    the same batch). Finite log-probabilities must be bit-identical; -inf must stay -inf;
    blobs of walkers with a finite log-probability must be equal (NaN equals NaN). The
    sampler's RNG is not touched.

    Parameters
    ----------
    model : LoadedModel
        The guarded evaluator.
    position : ndarray, shape (walkers, params)
    log_prob : ndarray, shape (walkers,)
    blobs : ndarray, shape (walkers, n_blobs)
        The stored start state.

    Raises
    ------
    ModelError
        Naming the first walker that differs, its parameter values and both values.
    """
    out = np.asarray(model(np.array(position, dtype=np.float64)), dtype=np.float64)
    again = out if out.ndim == 1 else out[:, 0]
    finite = np.isfinite(log_prob)
    differs = np.where(
        finite,
        again.view(np.int64) != np.asarray(log_prob, dtype=np.float64).view(np.int64),
        again != log_prob,
    )
    first: Any = None
    if differs.any():
        first = int(np.flatnonzero(differs)[0])
        before, after = float(log_prob[first]), float(again[first])
    elif out.ndim == 2 and blobs.size:
        b_again = out[:, 1:]
        same = (b_again == blobs) | (np.isnan(b_again) & np.isnan(blobs))
        bad = np.flatnonzero(finite & ~same.all(axis=1))
        if bad.size:
            first = int(bad[0])
            before, after = (
                float(blobs[first][~same[first]][0]),
                float(b_again[first][~same[first]][0]),
            )
    if first is None:
        return
    theta = ", ".join(
        f"{n}={v:.6g}" for n, v in zip(model.param_names, position[first], strict=True)
    )
    raise ModelError(
        f"log_prob is not deterministic: walker {first} at {theta} gave {before!r} at the "
        f"start and {after!r} when evaluated again; log_prob must be a pure function of theta "
        "and data (no numpy global RNG, clock or mutable state; put a seed in the data if "
        "randomness is intended); nothing was committed by this run"
    )
