"""An existing store at the run's path: already complete? made with the same settings? how
many steps did its own config ask for (fewer committed: a resume; all of them: an extension)?

The completeness check reads without writing or locking, so a complete store on a read-only
file system is recognised; a store made with other settings is refused (exit 5).
"""

from __future__ import annotations

import contextlib
from pathlib import Path
from typing import Any

from chainyard.config import RunConfig, steps_key
from chainyard.engine.guards import path_state
from chainyard.engine.identity import describe_differences
from chainyard.engine.marker import previous_run_line, read_marker, remove_marker
from chainyard.errors import StorageFaultError, StoreConflictError, StoreError, StoreLockedError
from chainyard.store import Store, writer_lock

__all__: list[str] = []


def _complete_read_only(
    config: RunConfig,
    path: Path,
    identity: dict[str, Any],
    say: Any,
) -> bool:
    """True (after saying so) if the store is already complete, found without writing.

    A complete store needs no lock, so this works on a read-only file system. A store that is
    not readable here is left to the locked path, which reports the problem.
    """
    if path_state(path) != "committed":
        return False
    try:
        store = Store.open(path)
    except StoreError:
        return False
    if store.attrs.get("derived") is not None:
        return False
    _check_identity(store, identity, path)
    if store.steps_done < config.sampler.steps:
        return False
    if read_marker(path) is not None:
        # a run died after its last commit: say so once (under the lock) and clear it
        with contextlib.suppress(StoreLockedError, StorageFaultError), writer_lock(path):
            marker = read_marker(path)
            if marker is not None:
                say(previous_run_line(marker, store.steps_done, complete=True))
                remove_marker(path)
    say(
        f"already complete ({store.steps_done:,} steps committed, "
        f"{config.sampler.steps:,} requested); nothing to do"
    )
    return True


def _stored_steps(store: Store) -> int:
    sampler = store.attrs["config"]["sampler"]
    return int(sampler[steps_key(sampler)])


def _check_identity(store: Store, identity: dict[str, Any], path: Path) -> None:
    diffs = describe_differences(store.attrs.get("identity") or {}, identity)
    if diffs:
        raise StoreConflictError(
            f"{path}: store was made with different settings: {'; '.join(diffs)}. "
            "Use --restart (restart=True) to discard it and start over"
        )
