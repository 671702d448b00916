"""JSON records of decisions and diagnostics, each with a provenance stamp."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from chainyard.errors import StoreError
from chainyard.provenance.record import stamp
from chainyard.store import Store
from chainyard.store.zarr_store import atomic_write_json

__all__ = ["RECORD_VERSION", "input_identity", "read_record", "store_digest", "write_record"]

RECORD_VERSION = 1


def store_digest(store: Store) -> str:
    """SHA-256 over a store's metadata and commit record (which holds every chunk checksum)."""
    from chainyard.provenance.inputs import store_digest as digest

    return digest(store)


def _file_digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def input_identity(item: Store | Path) -> dict[str, Any]:
    """Path and content hash of one input (a store or a file)."""
    if isinstance(item, Store):
        return {"path": str(item.path), "kind": "store", "sha256": store_digest(item)}
    return {"path": str(item), "kind": "file", "sha256": _file_digest(item)}


def write_record(
    path: str | Path,
    kind: str,
    body: dict[str, Any],
    inputs: Sequence[Store | Path],
    *,
    started_utc: str | None = None,
) -> dict[str, Any]:
    """Write a record ``{"kind", "format_version", **body, "inputs", "provenance"}`` as JSON."""
    record = {
        "kind": kind,
        "format_version": RECORD_VERSION,
        **body,
        "inputs": [input_identity(i) for i in inputs],
        "provenance": stamp(list(inputs), started_utc=started_utc),
    }
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    atomic_write_json(path, record, fsync=False)
    return record


def read_record(path: str | Path, kind: str) -> dict[str, Any]:
    """Read a record written by :func:`write_record`, checking its kind.

    Raises
    ------
    StoreError
        If the file is missing, not JSON, or of another kind.
    """
    path = Path(path)
    try:
        record = json.loads(path.read_text())
    except FileNotFoundError:
        raise StoreError(f"{path}: record not found") from None
    except ValueError as exc:
        raise StoreError(f"{path}: not a JSON record ({exc})") from None
    if not isinstance(record, dict) or record.get("kind") != kind:
        got = record.get("kind") if isinstance(record, dict) else type(record).__name__
        raise StoreError(f"{path}: expected a {kind!r} record, found {got!r}")
    return record
