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
"""

from __future__ import annotations

import contextlib
import json
import os
import warnings
import zipfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import zarr
from numpy.typing import NDArray

from chainyard import limits
from chainyard.errors import LimitExceededError, StoreError
from chainyard.facts import git_state, host_record, software_versions, utc_now
from chainyard.store.chunks import ChunkEncoder
from chainyard.store.faults import as_storage_fault, storage_faults
from chainyard.store.files import atomic_write_json, discard_folder, stored_size
from chainyard.store.integrity import (
    chunk_checksum,
    seal_record,
)
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
from chainyard.store.reading import read
from chainyard.store.validate import ArrayInfo, check_commit, one_line, read_json, validate_store
from chainyard.store.writing import RowWriter

__all__ = ["Store", "atomic_write_json", "chunk_checksum"]


# zarr warns on every use of a numcodecs codec (pcodec) that other zarr implementations may
# not read it; the store format documents its codecs, so this notice is silenced here only.
warnings.filterwarnings("ignore", message="Numcodecs codecs are not in the Zarr")


class Store(RowWriter):
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
                with contextlib.suppress(OSError):
                    discard_folder(path)
            raise fault from None
        return cls.open(path, writable=True)

    # ------------------------------------------------------------------ metadata
    @property
    def archive(self) -> zipfile.ZipFile | None:
        """The open zip file of a packed store (read-only use); None for a directory."""
        return self._archive

    @property
    def attrs(self) -> dict[str, Any]:
        """The store's chainyard attributes (a copy)."""
        return json.loads(json.dumps(self._attrs))

    @property
    def commit_record(self) -> dict[str, Any]:
        """The current commit record (a copy)."""
        return json.loads(json.dumps(self._commit))

    @property
    def steps_done(self) -> int:
        """Number of committed steps."""
        return int(self._commit["steps_done"])

    @property
    def param_names(self) -> tuple[str, ...]:
        """Parameter names in draw order."""
        return tuple(self._attrs["param_names"])

    @property
    def blob_names(self) -> tuple[str, ...]:
        """Names of the stored blobs."""
        return tuple(self._attrs.get("blob_names", ()))

    @property
    def walkers(self) -> int:
        """Number of walkers."""
        return int(self._attrs["walkers"])

    @property
    def replica(self) -> int:
        """Replica index of this store's stream."""
        return int(self._attrs["replica"])

    @property
    def capacity(self) -> int:
        """Rows allocated in the draws arrays (>= steps_done)."""
        return int(self._array(POSITION).shape[0])

    @property
    def chunk_steps(self) -> int:
        """Steps per stored chunk."""
        if self._chunk_steps is None:  # fixed at creation: read once
            self._chunk_steps = int(self._array(POSITION).chunks[0])
        return self._chunk_steps

    @property
    def config(self) -> Any:
        """The run configuration the store was made with, as a :class:`RunConfig`.

        Raises
        ------
        StoreError
            If the stored config is not a valid run config (the store is damaged).
        """
        from chainyard.config import parse_config
        from chainyard.errors import ConfigError

        base = Path(str(self._attrs.get("config_dir", ".")))
        try:
            source = f"{self.path} (stored)"
            return parse_config(self._attrs["config"], base_dir=base, source=source)
        except ConfigError as exc:  # the store's own record is damaged, not the user's config
            raise StoreError(
                f"{self.path}/zarr.json: attribute config is not a valid run config "
                f"({exc.problems[0]}); the store is damaged"
            ) from None

    # ------------------------------------------------------------------ reading
    def _node(self, node: str) -> zarr.Array:
        """The opened zarr array ``node`` (e.g. ``draws/position``)."""
        arr = self._nodes.get(node)
        if arr is None:
            found = self._group[node]
            assert isinstance(found, zarr.Array)
            arr = self._nodes[node] = found
        return arr

    def _array(self, name: str) -> zarr.Array:
        return self._node(f"{DRAWS}/{name}")

    def _rows(
        self, name: str, start: int, stop: int | None, column: int | None = None
    ) -> NDArray[Any]:
        start, stop, _ = slice(start, stop).indices(self.steps_done)
        return read(self, f"{DRAWS}/{name}", start, max(start, stop), column=column)

    def draws(self, start: int = 0, stop: int | None = None) -> NDArray[np.float64]:
        """Committed positions, shape (steps, walkers, params)."""
        return self._rows(POSITION, start, stop)

    def log_prob(self, start: int = 0, stop: int | None = None) -> NDArray[np.float64]:
        """Committed log-probabilities, shape (steps, walkers)."""
        return self._rows(LOG_PROB, start, stop)

    def accepted(self, start: int = 0, stop: int | None = None) -> NDArray[np.bool_]:
        """Whether each walker's proposal was accepted at each step, shape (steps, walkers)."""
        return self._rows(ACCEPTED, start, stop)

    def blob(self, name: str, start: int = 0, stop: int | None = None) -> NDArray[np.float64]:
        """One blob's committed values, shape (steps, walkers)."""
        if name not in self.blob_names:
            raise StoreError(f"{self.path}: no blob {name!r}; stored: {list(self.blob_names)}")
        return self._rows(f"{BLOB}/{name}", start, stop)

    def column(
        self, param: int | str, start: int = 0, stop: int | None = None
    ) -> NDArray[np.float64]:
        """One parameter's committed draws, shape (steps, walkers); reads only that column."""
        names = self.param_names
        if isinstance(param, str):
            if param not in names:
                raise StoreError(f"{self.path}: no parameter {param!r}; stored: {list(names)}")
            j = names.index(param)
        else:
            j = int(param)
            if not 0 <= j < len(names):
                raise StoreError(
                    f"{self.path}: no parameter {j}; the store holds {len(names)} "
                    f"(0-{len(names) - 1})"
                )
        return self._rows(POSITION, start, stop, column=j)

    def iter_chunks(self, start: int = 0, stop: int | None = None) -> Iterator[tuple[int, int]]:
        """Step ranges ``(a, b)`` aligned to stored chunks covering ``[start, stop)``."""
        start, stop, _ = slice(start, stop).indices(self.steps_done)
        size = self.chunk_steps
        a = start
        while a < stop:
            b = min(stop, (a // size + 1) * size)
            yield a, b
            a = b

    def start_state(self) -> dict[str, NDArray[np.float64]]:
        """Positions, log-prob and blobs before the first step."""
        return {name: self.start_array(name) for name in self.start_names()}

    def start_names(self) -> tuple[str, ...]:
        """Names (under ``start/``) of the start-state arrays."""
        return (POSITION, LOG_PROB, *(f"{BLOB}/{b}" for b in self.blob_names))

    def start_array(self, name: str, *, checked: bool = True) -> NDArray[np.float64]:
        """One start-state array (``position``, ``log_prob`` or ``blob/NAME``)."""
        if name not in self.start_names():
            raise StoreError(f"{self.path}: no start array {name!r}; stored: {self.start_names()}")
        return read(self, f"{START}/{name}", 0, 0, checked=checked)

    def last_state(self) -> dict[str, NDArray[np.float64]]:
        """Positions, log-prob and blobs after the last committed step (start state if none)."""
        n = self.steps_done
        if n == 0:
            return self.start_state()
        out = {POSITION: self.draws(n - 1, n)[0], LOG_PROB: self.log_prob(n - 1, n)[0]}
        for b in self.blob_names:
            out[f"{BLOB}/{b}"] = self.blob(b, n - 1, n)[0]
        return out

    def array_names(self) -> tuple[str, ...]:
        """Names (under ``draws/``) of every per-step array."""
        return (POSITION, LOG_PROB, ACCEPTED, *(f"{BLOB}/{b}" for b in self.blob_names))

    def read_rows(
        self, name: str, start: int, stop: int, step: int = 1, *, checked: bool = True
    ) -> NDArray[Any]:
        """Rows ``start:stop:step`` of any per-step array, committed or not.

        ``checked=False`` skips the comparison with the recorded checksums (decoding stays
        bounded): for checks that compare and report themselves (``verify``).
        """
        if name not in self.array_names():
            raise StoreError(f"{self.path}: no array {name!r}; stored: {self.array_names()}")
        return read(self, f"{DRAWS}/{name}", start, stop, step, checked=checked)

    # ------------------------------------------------------------------ raw keys
    def read_bytes(self, key: str) -> bytes | None:
        """Raw stored bytes of ``key`` (e.g. ``"zarr.json"``); None if there is no such key.

        The size is checked before reading: a JSON file against the ``metadata_bytes`` limit,
        anything else against the most a chunk within ``chunk_bytes`` can take when stored.
        """
        size = stored_size(self, key)
        if size is None:
            return None
        what = f"{self.path}/{key}"
        if key.endswith(".json"):
            limits.check("metadata_bytes", size, what)
        else:
            from chainyard.store.packed import most_chunk_file_bytes

            most = most_chunk_file_bytes(limits.value("chunk_bytes"))
            if size > most:
                raise LimitExceededError(
                    f"{what}: a stored chunk of {size:,} bytes is more than any chunk within the "
                    f"chunk_bytes limit can take ({most:,}); the store is damaged"
                )
        try:
            if self._archive is not None:
                return self._archive.read(key)
            return (self.path / key).read_bytes()
        except (KeyError, FileNotFoundError, IsADirectoryError, NotADirectoryError):
            return None

    def chunk_key(self, name: str, index: int) -> str:
        """Key of chunk ``index`` (along steps) of the per-step array ``draws/<name>``."""
        arr = self._array(name)
        return f"{DRAWS}/{name}/" + arr.metadata.encode_chunk_key((index, *(0,) * (arr.ndim - 1)))

    def start_chunk_key(self, name: str) -> str:
        """Key of the single chunk of the start array ``start/<name>``."""
        arr = self._node(f"{START}/{name}")
        return f"{START}/{name}/" + arr.metadata.encode_chunk_key((0,) * arr.ndim)

    # ------------------------------------------------------------------ committing
    def reload_commit(self) -> None:
        """Re-read the commit record from disk (another writer of this run may have moved it)."""
        if self._archive is None:
            commit = read_json(self.path / COMMIT_FILE)
            check_commit(commit, f"{self.path}/{COMMIT_FILE}")
            self._commit = commit
            self._seal_checked = False

    def commit(self, record: dict[str, Any], *, fsync: bool) -> None:
        """Make ``record`` (with its ``steps_done``) the store's commit record: the commit point.

        The record is written with a fresh integrity block (:func:`seal_record`): checksums of
        the stored bytes of the chunks this commit touched, and the metadata seal. If the file
        system refuses the write, StorageFaultError is raised and the previous record stays.
        """
        sealed = seal_record(
            self, record, self._commit, written=self._written, file_sums=self._file_sums
        )
        target = self.path / COMMIT_FILE
        # the temporary name atomic_write_json uses (removed if the write fails)
        tmp = target.with_name(f".{COMMIT_FILE}.{os.getpid()}.tmp")
        done = self._commit.get("steps_done") if self._commit else None
        with storage_faults(target, committed=done, partials=(tmp,)):
            atomic_write_json(target, sealed, fsync=fsync)
        self._commit = json.loads(json.dumps(sealed))
        self._written = set()
        self._file_sums = {}

    def update_attrs(self, **changes: Any) -> None:
        """Change chainyard attributes (used only when a run is extended).

        The current commit record is then rewritten (same content, atomically) so that its
        seal covers the new attributes.
        """
        before = dict(self._attrs)
        self._attrs.update(changes)
        try:
            with storage_faults(self.path / "zarr.json", committed=self.steps_done):
                self._group.attrs.update({ATTRS_KEY: self._attrs})
        except BaseException:
            self._attrs = before
            raise
        self.commit(self._commit, fsync=True)
