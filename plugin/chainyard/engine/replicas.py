"""``sample --replicas N``: every replica of a run from one command, one after the other."""

from __future__ import annotations

import sys
from typing import Any

from chainyard.config import RunConfig
from chainyard.errors import ConfigError
from chainyard.store import Store

__all__ = ["REPLICA_FIELD", "check_replicas_option", "sample_replicas"]

#: Placeholder in ``--out`` replaced by the replica index (``run/replica-{replica}.zarr``).
REPLICA_FIELD = "{replica}"


def check_replicas_option(out: str, replicas: int, replica: int | None) -> None:
    """Refuse ``--replicas`` without ``{replica}`` in ``--out``, or beside ``--replica``.

    Raises
    ------
    ConfigError
        One line naming the option and what is allowed (exit 2).
    """
    if replica is not None:
        raise ConfigError("--replicas samples replicas 0 to N-1; give it or --replica R, not both")
    if REPLICA_FIELD not in out:
        raise ConfigError(
            f"--replicas {replicas}: --out must hold {REPLICA_FIELD} so that every replica "
            f"gets its own store (e.g. --out 'run/replica-{REPLICA_FIELD}.zarr')"
        )


def sample_replicas(config: RunConfig, out: str, replicas: int, **kwargs: Any) -> list[Store]:
    """Sample (create, resume or extend) replicas ``0 .. replicas-1`` in turn.

    Parameters
    ----------
    config : RunConfig
        The validated run configuration.
    out : str
        Store path holding ``{replica}``, replaced by each index.
    replicas : int
        How many replicas (from 0).
    **kwargs
        Passed to :func:`chainyard.engine.sample` (``restart``, ``progress``, ``workers``...).

    Returns
    -------
    list of Store
        The stores, in replica order. The first failure stops the loop (stores already
        complete stay as they are; rerunning the command resumes where it stopped).
    """
    from chainyard.engine import sample

    if replicas != config.replicas:
        print(
            f"note: the config says replicas: {config.replicas}; sampling {replicas} "
            "as --replicas asks",
            file=sys.stderr,
        )
    stores = []
    for r in range(replicas):
        path = out.replace(REPLICA_FIELD, str(r))
        print(f"replica {r} of {replicas}: {path}", file=sys.stderr, flush=True)
        stores.append(sample(config, path, replica=r, **kwargs))
    return stores
