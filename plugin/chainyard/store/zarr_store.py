"""The zarr v3 run store: creation, row writes, the commit protocol and the reading API.

Commit protocol (crash safe at every instant):

1. rows ``[steps_done, new)`` of every array are written (each chunk file is written to a
   temporary name and renamed over the old one, so a chunk is either old or new);
2. with ``fsync`` on, those chunk files and their folders are flushed to disk;
3. ``commit.json`` (new ``steps_done``, sampler RNG state, chunk checksums, segment history)
   is written to a temporary file, flushed and renamed over the old one. This rename is the
   commit point.

A crash before step 3 leaves the old record in force; rows past it are ignored and
overwritten on resume. Every commit record carries an integrity block (checksums of the stored
chunk bytes and a seal over the metadata; see :mod:`chainyard.store.integrity`). Reading never
executes code: zarr metadata and JSON only. A store packed into a single zip file (``chainyard
pack``) opens read-only with the same API.

:class:`Store` (here: opening, creating, closing) gathers its parts: the reading API
(:mod:`chainyard.store.read_api`), row writes (:mod:`chainyard.store.writing`) and the commit
record (:mod:`chainyard.store.committing`).
"""

from __future__ import annotations

import contextlib
import warnings
import zipfile
from pathlib import Path
from typing import Any

import numpy as np
import zarr
from numpy.typing import NDArray

from chainyard.errors import StoreError
from chainyard.facts import git_state, host_record, software_versions, utc_now
from chainyard.store.chunks import ChunkEncoder
from chainyard.store.committing import Committer
from chainyard.store.faults import as_storage_fault, settle_zarr_writes
from chainyard.store.files import atomic_write_json, discard_folder
from chainyard.store.integrity import chunk_checksum
from chainyard.store.layout import (
    ACCEPTED,
    ATTRS_KEY,
    BLOB,
    COMMIT_FILE,
    DRAWS,
    FORMAT_NAME,
    FORMAT_VERSION,
    LOG_PROB,
    POSITION,
    START,
    codec_kwargs,
)
from chainyard.store.read_api import StoreReader
from chainyard.store.validate import ArrayInfo, check_commit, one_line, read_json, validate_store
from chainyard.store.writing import RowWriter

__all__ = ["Store", "atomic_write_json", "chunk_checksum"]


# zarr warns on every use of a numcodecs codec (pcodec) that other zarr implementations may
# not read it; the store format documents its codecs, so this notice is silenced here only.
warnings.filterwarnings("ignore", message="Numcodecs codecs are not in the Zarr")


class Store(StoreReader, Committer, RowWriter):
    """A chainyard run store on local disk.

    Use :func:`chainyard.open_store` to read one; :func:`chainyard.sample` creates and
    extends them. Array accessors return only committed rows.

    Attributes
    ----------
    path : Path
        The store directory (or the zip file of a packed store).
    packed : bool
        True for a store read from a single zip file (always read-only).
    """

    def __init__(
        self,
        path: Path,
        group: zarr.Group,
        commit: dict[str, Any],
        archive: zipfile.ZipFile | None = None,
    ) -> None:
        self.path = path
        self._group = group
        self._commit = commit
        self._archive = archive
        self.packed = archive is not None
        self._written: set[int] = set()  # chunk indices written since the last commit
        # stored-byte checksums of chunk files written directly since the last commit
        self._file_sums: dict[str, dict[int, str]] = {}
        self._encoder_cache: dict[str, ChunkEncoder | None] | None = None
        self._chunk_meta: dict[str, dict[str, Any]] = {}
        self._chunk_steps: int | None = None
        self._info: dict[str, ArrayInfo] = {}  # validated metadata by node (after open)
        self._nodes: dict[str, zarr.Array] = {}  # opened arrays by node (after open)
        self._keys: set[str] | None = None  # member names of a packed store
        self._layouts: dict[str, Any] = {}  # chunk layouts by node (store.reading)
        self._seal_checked = False  # the seal was checked against this commit record
        attrs = dict(group.attrs).get(ATTRS_KEY)
        if not isinstance(attrs, dict) or attrs.get("format") != FORMAT_NAME:
            raise StoreError(
                f"{path}/zarr.json: no '{ATTRS_KEY}' attributes; not a chainyard store"
            )
        if attrs.get("format_version") != FORMAT_VERSION:
            raise StoreError(
                f"{path}/zarr.json: store format version {attrs.get('format_version')} is not "
                f"supported (this chainyard reads version {FORMAT_VERSION})"
            )
        self._attrs: dict[str, Any] = attrs

    # ------------------------------------------------------------------ opening
    @classmethod
    def open(cls, path: str | Path, *, writable: bool = False) -> Store:
        """Open an existing store (read-only unless ``writable``).

        Every metadata file is checked before it is used (see :mod:`chainyard.store.validate`):
        sizes against :mod:`chainyard.limits`, then types, the array shapes against the
        attributes, data types and chunk shapes.

        Raises
        ------
        StoreError
            If the path is missing or is not a readable, undamaged chainyard store (one line
            naming the file and the field).
        """
        from chainyard.store.remote import is_remote

        if is_remote(path):  # a store or pack in object storage: read through a local copy
            if writable:
                raise StoreError(f"{path}: a store in object storage is read-only here")
            from chainyard.store.remote import local_copy

            path = local_copy(path)
        path = Path(path)
        if not path.exists():
            raise StoreError(f"{path}: store not found")
        if path.is_file():
            from chainyard.store.packed import open_packed

            commit, group, archive = open_packed(path, writable=writable)
            check_commit(commit, f"{path}/{COMMIT_FILE}")
            store = cls(path, group, commit, archive)
        else:
            if not (path / COMMIT_FILE).is_file():
                raise StoreError(f"{path}: not a chainyard store (no {COMMIT_FILE})")
            commit = read_json(path / COMMIT_FILE)
            check_commit(commit, f"{path}/{COMMIT_FILE}")
            if not (path / "zarr.json").is_file():
                raise StoreError(
                    f"{path}/zarr.json: missing; not a chainyard store (or a damaged one)"
                )
            root = read_json(path / "zarr.json")
            if not isinstance(root, dict) or not isinstance(root.get("attributes"), dict):
                raise StoreError(f"{path}/zarr.json: no attributes; not a chainyard store")
            try:
                group = zarr.open_group(path, mode="r+" if writable else "r")
            except Exception as exc:
                raise StoreError(
                    f"{path}/zarr.json: cannot open as a zarr group ({one_line(exc)})"
                ) from None
            store = cls(path, group, commit)
        try:
            validate_store(store)
        except BaseException:
            store.close()
            raise
        return store

    def close(self) -> None:
        """Release the zip file of a packed store (nothing to do for a directory)."""
        if self._archive is not None:
            self._archive.close()
            self._group.store.close()

    @classmethod
    def create(
        cls,
        path: str | Path,
        *,
        attrs: dict[str, Any],
        walkers: int,
        n_params: int,
        blob_names: tuple[str, ...],
        capacity: int,
        chunk_steps: int,
        codec: str,
        level: int | None,
        start: dict[str, NDArray[np.float64]],
        commit: dict[str, Any],
        fsync: bool,
    ) -> Store:
        """Create a new store with empty draws and the start state; write the first commit.

        Raises
        ------
        StorageFaultError
            If the file system refuses a write (the new store is then removed).
        """
        path = Path(path)
        full = {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            **attrs,
            "created_by": {
                "utc": utc_now(),
                "software": software_versions(),
                "host": host_record(),
                "git": git_state(Path.cwd()),
            },
        }
        existed = path.exists()
        try:
            group = zarr.open_group(path, mode="w", attributes={ATTRS_KEY: full})
            shapes = {
                POSITION: ((capacity, walkers, n_params), "float64"),
                LOG_PROB: ((capacity, walkers), "float64"),
                ACCEPTED: ((capacity, walkers), "bool"),
                **{f"{BLOB}/{b}": ((capacity, walkers), "float64") for b in blob_names},
            }
            for name, (shape, dtype) in shapes.items():
                group.create_array(
                    f"{DRAWS}/{name}",
                    shape=shape,
                    chunks=(chunk_steps, *shape[1:]),
                    dtype=dtype,
                    fill_value=False if dtype == "bool" else np.nan,
                    **codec_kwargs(codec, level, dtype),
                )
            for name, value in start.items():
                arr = group.create_array(
                    f"{START}/{name}",
                    shape=value.shape,
                    dtype="float64",
                    fill_value=np.nan,
                    compressors=None,
                )
                arr[...] = value
            cls(path, group, {}).commit(commit, fsync=fsync)
        except Exception as exc:
            fault = as_storage_fault(exc, path, committed=None)
            if fault is None:
                raise
            if not existed:  # a creation cut short holds nothing of value
                settle_zarr_writes()  # else a write still running recreates its folder
                with contextlib.suppress(OSError):
                    discard_folder(path)
            raise fault from None
        return cls.open(path, writable=True)
