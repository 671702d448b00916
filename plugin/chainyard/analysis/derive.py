"""Derived stores: a source store with burn-in discarded and/or thinned, never resumable.

A derived store is written to a temporary sibling and then swapped in under the output's
single-writer lock (see :mod:`chainyard.analysis.outputs`), so a kill at any instant leaves
either the previous derived store or the new one, complete.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.analysis.outputs import publish_derived
from chainyard.analysis.records import input_identity
from chainyard.errors import StoreError
from chainyard.provenance import utc_now
from chainyard.store import Store, chunk_checksum

__all__ = ["derive_store"]


def derive_store(
    source: Store,
    out: str | Path,
    *,
    discard: int = 0,
    factor: int = 1,
    stop: int | None = None,
    records: Sequence[Path] = (),
    burn_in_decided: bool | None = None,
) -> Store:
    """Write ``source`` steps ``discard, discard + factor, ...`` to a new store at ``out``.

    Parameters
    ----------
    source : Store
        The store to derive from (read one chunk at a time).
    out : str or Path
        The new store's directory. Only a derived chainyard store there is replaced; the
        source, a folder holding it or the current folder, a path inside any store and
        anything else already at ``out`` are refused.
    discard : int
        Burn-in steps dropped from the start.
    factor : int
        Thinning factor (1 keeps every step).
    stop : int, optional
        Source steps from ``stop`` on are left out (default: keep up to the last committed).
    records : sequence of Path
        Decision records that justified ``discard`` and ``factor`` (identified by content
        hash in the derived store's attributes).
    burn_in_decided : bool, optional
        Whether a burn-in decision (a record) set ``discard``, or the source's burn-in was
        already decided; recorded as ``attrs["derived"]["burn_in_decided"]`` so that readers
        can say when the draws may include burn-in. Default: True when ``records`` is given.

    Returns
    -------
    Store
        The derived store; its ``attrs["derived"]`` names the source (path and digest), the
        step mapping and the records.

    Raises
    ------
    StoreError
        If ``out`` is refused (exit 4) or the step range is empty.
    StoreLockedError
        If another process is writing ``out`` (exit 6).
    """
    end = source.steps_done if stop is None else min(int(stop), source.steps_done)
    if not 0 <= discard < end:
        raise StoreError(f"{source.path}: cannot discard {discard} of {end} committed steps")
    if factor < 1:
        raise StoreError(f"thinning factor must be >= 1, got {factor}")
    out = Path(out)
    with publish_derived(out, source=Path(source.path)) as tmp:
        decided = bool(records) if burn_in_decided is None else burn_in_decided
        _write_derived(
            source,
            tmp,
            discard=discard,
            factor=factor,
            stop=end,
            records=records,
            decided=decided,
        )
    return Store.open(out)


def _write_derived(
    source: Store,
    out: Path,
    *,
    discard: int,
    factor: int,
    stop: int,
    records: Sequence[Path],
    decided: bool,
) -> None:
    """Write the derived store at ``out`` (a fresh temporary folder)."""
    kept = np.arange(discard, stop, factor)
    n = int(kept.size)
    attrs = source.attrs
    attrs.pop("format", None)
    attrs.pop("format_version", None)
    parent = attrs.get("derived")
    attrs["derived"] = {
        "source": input_identity(source),
        "discard": int(discard),
        "factor": int(factor),
        "source_steps": [int(discard), int(stop), int(factor)],
        "records": [input_identity(Path(r)) for r in records],
        "burn_in_decided": bool(decided),
        "parent": parent,
        "created_utc": utc_now(),
    }
    storage = attrs["config"]["storage"]
    chunk = int(storage["chunk_steps"])
    start = source.start_state()
    commit: dict[str, Any] = {
        "format_version": 1,
        "steps_done": 0,
        "random_state": None,
        "checksums": {},
        "segments": [],
        "updated_utc": utc_now(),
    }
    derived = Store.create(
        out,
        attrs=attrs,
        walkers=source.walkers,
        n_params=len(source.param_names),
        blob_names=source.blob_names,
        capacity=max(n, 1),
        chunk_steps=chunk,
        codec=storage["codec"],
        level=storage["level"],
        start=start,
        commit=commit,
        fsync=False,
    )
    checksums: dict[str, list[str]] = {}
    for a in range(0, n, chunk):
        b = min(n, a + chunk)
        lo, hi = int(kept[a]), int(kept[b - 1]) + 1
        rows: dict[str, NDArray[Any]] = {}
        for name in source.array_names():
            block = source.read_rows(name, lo, hi, factor)
            rows[name] = block
            checksums.setdefault(name, []).append(chunk_checksum(block))
        derived.write_rows(a, rows, fsync=False)
    commit.update(steps_done=n, checksums=checksums, updated_utc=utc_now())
    derived.commit(commit, fsync=True)
