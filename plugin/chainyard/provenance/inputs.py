"""Content hashes of stores and files, and finding a recorded input again by its hash."""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any

from chainyard.errors import StoreError
from chainyard.store import Store
from chainyard.store.layout import COMMIT_FILE

__all__ = ["file_digest", "input_candidates", "open_matching", "store_digest"]


def store_digest(store: Store) -> str:
    """SHA-256 over a store's ``zarr.json`` and ``commit.json`` bytes (packed stores too)."""
    h = hashlib.sha256()
    for key in ("zarr.json", COMMIT_FILE):
        h.update(store.read_bytes(key) or b"")
    return h.hexdigest()


def file_digest(path: Path) -> str:
    """SHA-256 (hex) of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def input_candidates(recorded: str, near: Path | None) -> list[Path]:
    """Existing paths a recorded input path may refer to, most likely first.

    Inputs are recorded as given (often relative to the working directory of the step that
    used them), so a relative path is tried against the current directory and then against
    the folders above ``near`` (the output that names it). Callers accept a candidate only
    if its content hash matches.
    """
    path = Path(recorded)
    if path.is_absolute():
        return [path] if path.exists() else []
    bases = [Path.cwd()]
    if near is not None:
        bases += list(Path(near).absolute().parents)[:6]
    out: list[Path] = []
    for base in bases:
        p = base / path
        if p.exists() and p.resolve() not in {q.resolve() for q in out}:
            out.append(p)
    return out


def open_matching(ref: dict[str, Any] | None, near: Path | None = None) -> Store | None:
    """The store at ``ref["path"]`` (see :func:`input_candidates`) whose digest matches."""
    if not ref or not ref.get("path"):
        return None
    for candidate in input_candidates(str(ref["path"]), near):
        try:
            store = Store.open(candidate)
        except StoreError:
            continue
        if store_digest(store) == ref.get("sha256"):
            return store
        store.close()
    return None
