"""The small interface between the worker pool and whatever runs its workers.

A batch of walkers is cut into contiguous :class:`SliceTask` s. An executor hands each task
to a free worker that holds its own :class:`~chainyard.model.LoadedModel`
(loaded once, from the paths in a :class:`WorkerSpec`) and returns one :class:`SliceOutcome`
per task, in task order. What a worker does with a task is :func:`evaluate_task`, the same
for every executor; only the transport differs. The shipped executor runs local processes
(:mod:`chainyard.engine.processes`); an MPI (``mpi4py.futures.MPIPoolExecutor``) or Dask
executor would load the model in its workers' initialiser with :func:`load_worker_model` and
map :func:`evaluate_task` over the tasks (see DEVELOPERS.md, "Worker pool").
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, NamedTuple, Protocol

import numpy as np
from numpy.typing import NDArray

from chainyard.errors import ModelError

__all__ = [
    "Executor",
    "SliceOutcome",
    "SliceTask",
    "WorkerSpec",
    "evaluate_task",
    "load_worker_model",
]


class WorkerSpec(NamedTuple):
    """What a worker needs to load the model: the run config as JSON values and where its
    relative paths start.

    Attributes
    ----------
    config : dict
        ``RunConfig.normalised()``.
    base_dir : str
        Directory the config's relative paths are resolved against.
    source : str
        The config's name, for messages.
    """

    config: dict[str, Any]
    base_dir: str
    source: str

    def to_json(self) -> str:
        return json.dumps({"config": self.config, "base_dir": self.base_dir, "source": self.source})

    @classmethod
    def from_json(cls, text: str) -> WorkerSpec:
        d = json.loads(text)
        return cls(d["config"], d["base_dir"], d["source"])


class SliceTask(NamedTuple):
    """Rows ``offset .. offset + len(thetas)`` of a batch of ``total`` walkers.

    Attributes
    ----------
    offset : int
    thetas : ndarray, shape (k, params)
    total : int
    step : int or None
        The step being computed (named in messages), if the driver set it.
    """

    offset: int
    thetas: NDArray[np.float64]
    total: int
    step: int | None


class SliceOutcome(NamedTuple):
    """A task's values, or the one-line ModelError message that replaced them.

    Attributes
    ----------
    values : ndarray of shape (k,) or (k, 1 + n_blobs), or None
        Not yet checked for NaN or +inf (the pool checks the whole batch).
    error : str or None
    """

    values: NDArray[np.float64] | None
    error: str | None


class Executor(Protocol):
    """What the pool needs from the thing that runs its workers."""

    workers: int
    """Number of workers (tasks per call are at most this many)."""

    def start(self, spec: WorkerSpec) -> None:
        """Start the workers; each loads the model from ``spec`` once.

        Raises ModelError (one line) if a worker cannot start or load the model.
        """
        ...

    def run(self, tasks: list[SliceTask]) -> list[SliceOutcome]:
        """Evaluate ``tasks`` (any number; a free worker takes the next) and return their
        outcomes in task order.

        Waits for every task given out. A worker that is lost raises ModelError (one line)
        after the others have answered.
        """
        ...

    def close(self) -> None:
        """Stop the workers (idempotent; also after an interrupted :meth:`run`)."""
        ...


def load_worker_model(spec: WorkerSpec) -> Any:
    """The worker's own guarded model, loaded from the spec's paths (ConfigError if not)."""
    from chainyard.config import parse_config
    from chainyard.model import load_model

    config = parse_config(spec.config, base_dir=Path(spec.base_dir), source=spec.source)
    return load_model(config)


def evaluate_task(model: Any, task: SliceTask) -> SliceOutcome:
    """What a worker does with one task (the same for every executor)."""
    try:
        values = model.evaluate_slice(task.thetas, task.offset, task.total, task.step)
    except ModelError as exc:
        return SliceOutcome(None, str(exc))
    return SliceOutcome(np.ascontiguousarray(values, dtype=np.float64), None)
