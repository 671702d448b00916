"""The worker pool's executor on an existing Dask distributed cluster (``--workers dask://``).

Each Dask worker loads the run's model once, from the run config's own paths (the
:class:`~chainyard.engine.executor.WorkerSpec`, sent as JSON text), and keeps it for every
later task of the run; the client sends only that text, the slices' rows and a reference to
:func:`evaluate_on_worker`, an importable chainyard function. The user's model is never
serialised from the client, so chainyard and the model's files must be installed or visible
on every worker, as for a SLURM job.

A task is pure (the same rows give the same values on any worker), so a task whose worker
is lost is run again elsewhere by Dask and the draws do not change. When no worker is left
for ``LOST_SECONDS``, when Dask gives up on a task (``KilledWorker``), or when the scheduler
goes away, :meth:`DaskExecutor.run` raises one ModelError line; the run then ends as after
any model error, with its last commit intact, and resumes exactly.

Needs the ``distributed`` package (``pip install 'chainyard[dask]'``).
"""

from __future__ import annotations

import contextlib
import logging
import os
import time
from typing import Any

from chainyard.engine.executor import (
    SliceOutcome,
    SliceTask,
    WorkerSpec,
    evaluate_task,
    load_worker_model,
)
from chainyard.errors import ChainyardError, ConfigError, ModelError

__all__ = [
    "ADDRESS_ENV",
    "SCHEME",
    "DaskExecutor",
    "evaluate_on_worker",
    "is_dask_address",
    "scheduler_address",
]

#: how ``--workers`` names a Dask cluster: ``dask://HOST:PORT``, or ``dask://`` alone
SCHEME = "dask://"
#: where ``dask://`` alone finds the scheduler's address
ADDRESS_ENV = "DASK_SCHEDULER_ADDRESS"
#: seconds to connect to the scheduler and to wait for its first worker
CONNECT_SECONDS = 30.0
#: seconds a run waits with no worker in the cluster before it stops
LOST_SECONDS = 60.0
#: seconds between checks of the cluster while a slice is out
POLL_SECONDS = 0.5

#: models loaded in this (worker) process, by the spec's JSON text
_MODELS: dict[str, Any] = {}


def is_dask_address(value: object) -> bool:
    """Whether a ``workers`` value names a Dask cluster."""
    return isinstance(value, str) and value.strip().lower().startswith(SCHEME)


def scheduler_address(value: str) -> str:
    """The scheduler address (``tcp://HOST:PORT``) that ``dask://...`` names.

    Raises
    ------
    ConfigError
        If ``dask://`` is given alone and ``DASK_SCHEDULER_ADDRESS`` is not set, or the
        address has no port.
    """
    rest = value.strip()[len(SCHEME) :]
    if not rest:
        rest = os.environ.get(ADDRESS_ENV, "").strip()
        if not rest:
            raise ConfigError(
                f"--workers dask:// takes the scheduler's address from {ADDRESS_ENV}, which "
                "is not set; give --workers dask://HOST:PORT"
            )
    if "://" not in rest:
        rest = f"tcp://{rest}"
    host_port = rest.split("://", 1)[1]
    if not host_port.rpartition(":")[2].isdigit():
        raise ConfigError(
            f"--workers {value}: a Dask scheduler address is HOST:PORT (e.g. "
            "dask://10.0.0.5:8786), got {host_port!r}"
        )
    return rest


def evaluate_on_worker(spec_json: str, task: SliceTask) -> SliceOutcome:
    """What a Dask worker does with one slice: load the model once, then evaluate.

    A model that cannot be loaded on the worker answers with its one-line message (the
    run stops as for a model error), naming the worker's host.
    """
    model = _MODELS.get(spec_json)
    if model is None:
        try:
            model = load_worker_model(WorkerSpec.from_json(spec_json))
        except ChainyardError as exc:
            import socket

            return SliceOutcome(None, f"on Dask worker {socket.gethostname()}: {exc}")
        _MODELS.clear()  # one run's model at a time per worker process
        _MODELS[spec_json] = model
    return evaluate_task(model, task)


class DaskExecutor:
    """Runs the pool's slices on the workers of an existing Dask cluster.

    Parameters
    ----------
    address : str
        The scheduler's address (``tcp://HOST:PORT``; see :func:`scheduler_address`).

    Attributes
    ----------
    workers : int
        Workers in the cluster when it was connected (slices per batch).
    """

    def __init__(self, address: str) -> None:
        self.address = address
        self.workers = 0
        self._client: Any = None
        self._spec_json = ""

    def connect(self) -> int:
        """Connect to the scheduler and wait for a first worker; returns the worker count.

        Raises
        ------
        ModelError
            If ``distributed`` is not installed, the scheduler does not answer, or no worker
            joins within ``CONNECT_SECONDS``.
        """
        try:
            from distributed import Client
        except ImportError:
            raise ModelError(
                "--workers dask://... needs the 'distributed' package: "
                "pip install 'chainyard[dask]'"
            ) from None
        # Dask logs its own tracebacks when a cluster goes away; the run reports one line
        for name in [*logging.root.manager.loggerDict, "distributed"]:
            if name == "distributed" or name.startswith("distributed."):
                logging.getLogger(name).setLevel(logging.CRITICAL + 1)
        try:
            self._client = Client(self.address, timeout=CONNECT_SECONDS, set_as_default=False)
            self._client.wait_for_workers(1, timeout=CONNECT_SECONDS)
        except (OSError, TimeoutError) as exc:
            self.close()
            raise ModelError(
                f"Dask scheduler at {self.address}: no cluster with workers answered within "
                f"{CONNECT_SECONDS:.0f} s ({type(exc).__name__})"
            ) from None
        self.workers = max(1, self._worker_count())
        return self.workers

    def _worker_count(self) -> int:
        try:
            return len(self._client.scheduler_info(n_workers=-1).get("workers", {}))
        except TypeError:  # older distributed: no n_workers argument
            return len(self._client.scheduler_info().get("workers", {}))

    def start(self, spec: WorkerSpec) -> None:
        """Remember how workers load the model (they load it at their first task)."""
        if self._client is None:
            self.connect()
        self._spec_json = spec.to_json()

    def run(self, tasks: list[SliceTask]) -> list[SliceOutcome]:
        """Evaluate ``tasks`` on the cluster; outcomes in task order."""
        client = self._client
        try:
            futures = [
                client.submit(evaluate_on_worker, self._spec_json, task, pure=False)
                for task in tasks
            ]
            outcomes: list[SliceOutcome] = []
            alone_since: float | None = None
            for future in futures:
                while True:
                    try:
                        outcomes.append(future.result(timeout=POLL_SECONDS))
                        break
                    except TimeoutError:
                        alone_since = self._check_cluster(alone_since)
            return outcomes
        except ModelError:
            raise
        except Exception as exc:  # scheduler gone, task given up (KilledWorker), ...
            text = str(exc).splitlines()[0][:200] if str(exc) else "lost"
            if "scheduler-connection-lost" in text or client.status != "running":
                text = "the connection to the scheduler was lost"
            raise ModelError(
                f"Dask cluster at {self.address}: {type(exc).__name__}: {text}; the run "
                "stopped at its last commit (rerun the same command to resume)"
            ) from None

    def _check_cluster(self, alone_since: float | None) -> float | None:
        """Raise ModelError if the scheduler is gone or no worker was left for too long;
        returns since when the cluster has had no worker (None while it has some)."""
        status = self._client.status
        if status != "running":
            raise ModelError(
                f"Dask scheduler at {self.address}: connection lost ({status}); the run "
                "stopped at its last commit (rerun the same command to resume)"
            )
        if self._worker_count():
            return None
        alone_since = alone_since or time.monotonic()
        if time.monotonic() - alone_since > LOST_SECONDS:
            raise ModelError(
                f"Dask cluster at {self.address}: no worker left for {LOST_SECONDS:.0f} s; "
                "the run stopped at its last commit (rerun the same command to resume)"
            )
        return alone_since

    def close(self) -> None:
        """Disconnect from the cluster (the cluster itself keeps running)."""
        client, self._client = self._client, None
        if client is not None:
            with contextlib.suppress(Exception):  # closing a client of a lost cluster
                client.close(timeout=5)
