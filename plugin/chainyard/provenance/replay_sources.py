"""Where a replay reads the model and data from: the user's folder, or a pack's own copies.

A plain store's recorded model and data paths resolve against --sources DIR or the
recorded absolute config_dir (never the current folder). A pack, packed or unpacked,
lists copies of its model and data files in its manifest; a replay writes them out below a
temporary folder at their recorded relative paths.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from chainyard.errors import ConfigError, UnsafeInputError
from chainyard.store import Store
from chainyard.store.files import iter_stored, read_stored, stored_size

__all__ = ["PACK_MANIFEST", "replay_base"]

PACK_MANIFEST = "pack/manifest.json"


def _pack_manifest(store: Store) -> dict[str, Any] | None:
    """The pack manifest a packed or unpacked store holds (None for a plain store)."""
    raw = read_stored(store, PACK_MANIFEST, "metadata_bytes")
    if raw is None:
        return None
    try:
        manifest = json.loads(raw)
    except ValueError:
        manifest = None
    if not isinstance(manifest, dict):
        raise UnsafeInputError(f"{store.path}: {PACK_MANIFEST} is not a JSON object")
    return manifest


def replay_base(store: Store, sources: str | Path | None) -> Path | None:
    """The folder a plain store's recorded model paths resolve against (None for a pack).

    Raises
    ------
    ConfigError
        (exit 2) if the recorded ``config_dir`` is not an absolute path and no ``sources``
        folder was given: recorded paths are never resolved against the current folder.
    """
    if sources is not None:
        return Path(sources).resolve()
    if _pack_manifest(store) is not None:
        return None
    recorded = store.attrs.get("config_dir")
    if not isinstance(recorded, str) or not Path(recorded).is_absolute():
        raise ConfigError(
            f"{store.path}: the recorded config_dir {recorded!r} is not an absolute path; "
            "recorded paths are never resolved against the current folder: give --sources DIR "
            "(the folder holding the model and data)"
        )
    return Path(recorded)


def _materialise_pack_sources(store: Store, into: Path) -> Path | None:
    """Write a pack's model/data files at their recorded relative paths below ``into``
    (copied in blocks; paths that would leave ``into`` are skipped)."""
    manifest = _pack_manifest(store)
    if manifest is None:
        return None
    sources = [
        s
        for s in manifest.get("sources") or []
        if isinstance(s, dict) and isinstance(s.get("path"), str) and s["path"]
    ]
    ups = [Path(s["path"]).parts.count("..") for s in sources]
    depth = min(max(ups, default=0), 16)
    base = into.joinpath(*(["d"] * depth)) if depth else into
    base.mkdir(parents=True, exist_ok=True)
    root = into.resolve()
    for s in sources:
        member = str(s.get("member"))
        if Path(s["path"]).is_absolute() or stored_size(store, member) is None:
            continue
        dest = (base / s["path"]).resolve()
        if not dest.is_relative_to(root):
            continue
        dest.parent.mkdir(parents=True, exist_ok=True)
        with open(dest, "wb") as f:
            for block in iter_stored(store, member):
                f.write(block)
    return base
