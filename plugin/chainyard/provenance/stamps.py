"""Provenance for outputs that are not JSON records: plots (PNG metadata) and sidecar files.

* Plots: pass ``metadata=png_metadata(stores)`` to ``Figure.savefig`` (PNG). The image then
  carries the :func:`~chainyard.provenance.record.stamp` of its inputs as text chunk
  ``chainyard:provenance`` (plus the standard ``Software`` key).
* Tables and other files (e.g. ``summary.csv``): :func:`write_sidecar` writes
  ``OUTPUT.provenance.json``, a record of kind ``chainyard.sidecar`` naming the output by
  content hash, its inputs, and the stamp.

:func:`chainyard.provenance.record.provenance_record` and ``chainyard verify`` read both.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from chainyard.provenance.png_text import PNG_KEY, read_png_stamp
from chainyard.provenance.record import file_digest, stamp, store_digest
from chainyard.store import Store
from chainyard.store.files import atomic_write_json

__all__ = [
    "PNG_KEY",
    "SIDECAR_KIND",
    "identity_of",
    "png_metadata",
    "read_png_stamp",
    "sidecar_path",
    "write_sidecar",
]

SIDECAR_KIND = "chainyard.sidecar"


def identity_of(item: Store | Path) -> dict[str, Any]:
    """Path, kind and content hash of an input (a store, packed store or file)."""
    if isinstance(item, Store):
        return {"path": str(item.path), "kind": "store", "sha256": store_digest(item)}
    return {"path": str(item), "kind": "file", "sha256": file_digest(Path(item))}


def png_metadata(inputs: Sequence[Store | Path]) -> dict[str, str]:
    """``savefig(metadata=...)`` for a PNG: the stamp and inputs of a plot, as text."""
    # a view of a store's steps (chainyard.analysis.view.StoreWindow) is stamped as its store
    inputs = [getattr(i, "source", i) for i in inputs]
    block = {"inputs": [identity_of(i) for i in inputs], "provenance": stamp(inputs)}
    version = block["provenance"]["software"].get("chainyard")
    return {
        "Software": f"chainyard {version}",
        PNG_KEY: json.dumps(block, sort_keys=True, separators=(",", ":")),
    }


def sidecar_path(output: str | Path) -> Path:
    """Where :func:`write_sidecar` puts the provenance of ``output``."""
    output = Path(output)
    return output.with_name(output.name + ".provenance.json")


def write_sidecar(output: str | Path, inputs: Sequence[Store | Path]) -> Path:
    """Write ``OUTPUT.provenance.json`` for a finished output file; returns its path."""
    output = Path(output)
    record = {
        "kind": SIDECAR_KIND,
        "format_version": 1,
        "output": identity_of(output),
        "inputs": [identity_of(i) for i in inputs],
        "provenance": stamp(inputs),
    }
    path = sidecar_path(output)
    atomic_write_json(path, record, fsync=False)
    return path
