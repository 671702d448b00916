"""Run until targets: extend every replica of a run in turn until the run-level verdict holds.

Each check samples every replica to the same length (the engine's exact extension, so each
final store equals a direct run of the same length), applies the run's burn-in policy across
all replicas, and diagnoses the remaining steps of *all* replicas together with
:func:`chainyard.analysis.diagnose.diagnose`: the same run-level verdict as ``diagnose``
(nested R-hat across replicas, tau, precision). Every check is recorded in each replica's
``target_checks.json`` with the estimated steps still needed.

With one replica the mixing check compares the halves of the run only (see
:mod:`chainyard.diagnostics.nested`).
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any, TextIO

from chainyard.analysis.decide import decide_burn_in
from chainyard.analysis.diagnose import diagnose
from chainyard.analysis.view import StoreWindow
from chainyard.config import RunConfig
from chainyard.engine import sample
from chainyard.errors import ConfigError
from chainyard.provenance import utc_now
from chainyard.store import Store
from chainyard.store.zarr_store import atomic_write_json

__all__ = ["CHECKS_FILE", "REPLICA_FIELD", "check_run", "replica_paths", "sample_until_targets"]

CHECKS_FILE = "target_checks.json"

#: Placeholder in ``--out`` replaced by the replica index (``run/r{replica}.zarr``).
REPLICA_FIELD = "{replica}"


def replica_paths(out: str | Path, replicas: int) -> list[Path]:
    """The store of every replica: ``out`` with ``{replica}`` replaced by 0, 1, ...

    Parameters
    ----------
    out : str or Path
        A path containing ``{replica}``.
    replicas : int

    Returns
    -------
    list of Path
    """
    text = str(out)
    return [Path(text.replace(REPLICA_FIELD, str(r))) for r in range(replicas)]


def check_run(stores: Sequence[Store], config: RunConfig) -> dict[str, Any]:
    """Burn-in decision across the replicas plus the run-level diagnostics and verdict."""
    cut = decide_burn_in(stores, config.burn_in)
    windows = [StoreWindow(s, cut.steps_discarded) for s in stores]
    result = diagnose(windows, config.targets)  # type: ignore[arg-type]
    verdict = result["verdict"]
    return {
        "steps": min(s.steps_done for s in stores),
        "burn_in": cut.steps_discarded,
        "replicas": [s.replica for s in stores],
        "ok": bool(verdict["ok"]),
        "checks": verdict["checks"],
        "more_steps": verdict["more_steps"],
        "lines": list(verdict["lines"]),
        "checked_utc": utc_now(),
    }


def check_replica(store: Store, config: RunConfig) -> dict[str, Any]:
    """:func:`check_run` of one store (kept for callers checking a single replica)."""
    return check_run([store], config)


def sample_until_targets(
    config: RunConfig,
    store_path: str | Path | Sequence[str | Path],
    replica: int | Sequence[int] = 0,
    *,
    restart: bool = False,
    progress: str = "auto",
    progress_interval: float = 10.0,
    stream: TextIO | None = None,
    workers: int | str = 1,
    cpus: int | None = None,
) -> tuple[Store, bool]:
    """Sample ``sampler.steps`` in every replica, then extend all by ``check_every`` until met.

    Stops at ``max_steps`` or after ``max_seconds`` of the config's ``extend_until_targets``
    section, which is required (:class:`~chainyard.errors.ConfigError` without it). Every
    check is appended to ``STORE/target_checks.json`` of every replica.

    Parameters
    ----------
    config : RunConfig
    store_path : path or sequence of paths
        One store per replica.
    replica : int or sequence of int
        The replica index of each store (same length as ``store_path``).

    Returns
    -------
    store : Store
        The first replica's store.
    met : bool
        Whether the last check met the targets.
    """
    paths = (
        [Path(store_path)] if isinstance(store_path, str | Path) else list(map(Path, store_path))
    )
    indices = [replica] if isinstance(replica, int) else list(replica)
    if len(paths) != len(indices):
        raise ValueError(f"{len(paths)} stores given for {len(indices)} replica indices")
    spec = config.extend_until_targets
    if spec is None:  # the budget is the user's to state: never extend without one
        raise ConfigError(
            f"{config.source}: extend_until_targets: required by --until-targets (the budget: "
            "check_every, max_steps, optional max_seconds); add the section or run without "
            "--until-targets"
        )
    t0 = time.monotonic()
    total = config.sampler.steps
    checks: list[dict[str, Any]] = []
    while True:
        stores = [
            sample(
                config.with_steps(total),
                path,
                r,
                restart=restart and not checks,
                progress=progress,
                progress_interval=progress_interval,
                stream=stream,
                workers=workers,
                cpus=cpus,
            )
            for path, r in zip(paths, indices, strict=True)
        ]
        check = check_run(stores, config)
        checks.append(check)
        for path in paths:
            atomic_write_json(
                path / CHECKS_FILE,
                {
                    "policy": spec.model_dump(mode="json"),
                    "stores": [str(p) for p in paths],
                    "checks": checks,
                },
                fsync=False,
            )
        verdict = "targets met" if check["ok"] else "targets not met"
        if not check["ok"] and check["more_steps"] is not None:
            verdict += f" (estimated {check['more_steps']:,} more steps after burn-in)"
        name = paths[0].name if len(paths) == 1 else f"{len(paths)} replicas"
        print(f"{name}: check at {total:,} steps: {verdict}", file=stream, flush=True)
        if check["ok"]:
            return stores[0], True
        out_of_time = spec.max_seconds is not None and time.monotonic() - t0 > spec.max_seconds
        if total >= spec.max_steps or out_of_time:
            return stores[0], False
        total = min(total + spec.check_every, spec.max_steps)
