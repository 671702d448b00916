"""Opening a store packed into a single zip file (read-only)."""

from __future__ import annotations

import json
import zipfile
from pathlib import Path
from typing import Any

import zarr

from chainyard.errors import StoreError
from chainyard.store.layout import COMMIT_FILE

__all__ = ["open_packed"]


def open_packed(
    path: Path, *, writable: bool
) -> tuple[dict[str, Any], zarr.Group, zipfile.ZipFile]:
    """Commit record, zarr group and open zip file of a packed store.

    Raises
    ------
    StoreError
        If the file is not a zip holding a chainyard store, or ``writable`` is asked for.
    """
    if not zipfile.is_zipfile(path):
        raise StoreError(f"{path}: is a file, neither a store directory nor a packed store")
    if writable:
        raise StoreError(
            f"{path}: is a packed store (read-only); unpack it (`chainyard unpack`) to write to it"
        )
    from zarr.storage import ZipStore

    try:
        archive = zipfile.ZipFile(path)
        commit = json.loads(archive.read(COMMIT_FILE))
    except KeyError:
        raise StoreError(f"{path}: not a chainyard store (no {COMMIT_FILE})") from None
    except (OSError, ValueError, zipfile.BadZipFile) as exc:
        raise StoreError(f"{path}/{COMMIT_FILE}: unreadable commit record ({exc})") from None
    try:
        group = zarr.open_group(ZipStore(path, mode="r"), mode="r")
    except Exception as exc:
        raise StoreError(f"{path}: cannot open as a zarr group ({exc})") from None
    return commit, group, archive
