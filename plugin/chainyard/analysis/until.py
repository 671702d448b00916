"""Run until targets: extend a replica chunk by chunk until its targets hold.

Each check applies the run's burn-in policy, diagnoses the remaining steps of this one replica
(R-hat then compares the halves of the run only: across-replica R-hat needs the other
replicas, see :mod:`chainyard.analysis.diagnose`) and records the result. Every extension is
the engine's exact extension, so the final store equals a direct run of the same length.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any, TextIO

from chainyard.analysis.decide import decide_burn_in
from chainyard.analysis.diagnose import diagnose
from chainyard.analysis.view import StoreWindow
from chainyard.config import ExtendSpec, RunConfig
from chainyard.engine import sample
from chainyard.provenance import utc_now
from chainyard.store import Store
from chainyard.store.zarr_store import atomic_write_json

__all__ = ["CHECKS_FILE", "check_replica", "sample_until_targets"]

CHECKS_FILE = "target_checks.json"


def check_replica(store: Store, config: RunConfig) -> dict[str, Any]:
    """Burn-in decision plus single-replica diagnostics and verdict, as a JSON-ready dict."""
    cut = decide_burn_in([store], config.burn_in)
    window = StoreWindow(store, cut.steps_discarded)
    result = diagnose([window], config.targets)  # type: ignore[list-item]
    return {
        "steps": store.steps_done,
        "burn_in": cut.steps_discarded,
        "ok": bool(result["verdict"]["ok"]),
        "lines": list(result["verdict"]["lines"]),
        "checked_utc": utc_now(),
    }


def sample_until_targets(
    config: RunConfig,
    store_path: str | Path,
    replica: int = 0,
    *,
    restart: bool = False,
    progress: str = "auto",
    progress_interval: float = 10.0,
    stream: TextIO | None = None,
) -> tuple[Store, bool]:
    """Sample ``sampler.steps``, then extend by ``check_every`` until the targets hold.

    Stops at ``max_steps`` or after ``max_seconds``. Every check is appended to
    ``STORE/target_checks.json``.

    Returns
    -------
    store : Store
    met : bool
        Whether the last check met the targets.
    """
    spec = config.extend_until_targets or ExtendSpec(max_steps=10 * config.sampler.steps)
    t0 = time.monotonic()
    total = config.sampler.steps
    checks: list[dict[str, Any]] = []
    path = Path(store_path)
    while True:
        store = sample(
            config.with_steps(total),
            path,
            replica,
            restart=restart and not checks,
            progress=progress,
            progress_interval=progress_interval,
            stream=stream,
        )
        check = check_replica(store, config)
        checks.append(check)
        atomic_write_json(
            path / CHECKS_FILE,
            {"policy": spec.model_dump(mode="json"), "checks": checks},
            fsync=False,
        )
        verdict = "targets met" if check["ok"] else "targets not met"
        print(f"{path.name}: check at {total:,} steps: {verdict}", file=stream, flush=True)
        if check["ok"]:
            return store, True
        out_of_time = spec.max_seconds is not None and time.monotonic() - t0 > spec.max_seconds
        if total >= spec.max_steps or out_of_time:
            return store, False
        total = min(total + spec.check_every, spec.max_steps)
