"""The reading API of a store: its attributes, committed rows, start state and raw keys.

:class:`StoreReader` is the reading half of :class:`chainyard.store.Store` (a mixin: the
store supplies ``path``, its zarr group, commit record and attributes). Chunks are read
through :func:`chainyard.store.reading.read`.
"""

from __future__ import annotations

import json
import zipfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import zarr
from numpy.typing import NDArray

from chainyard import limits
from chainyard.errors import LimitExceededError, StoreError
from chainyard.store.files import stored_size
from chainyard.store.layout import ACCEPTED, BLOB, DRAWS, LOG_PROB, POSITION, START
from chainyard.store.reading import read

__all__ = ["StoreReader"]


class StoreReader:
    """Reading a store's attributes and arrays (mixed into :class:`Store`)."""

    # provided by Store
    path: Path
    _group: zarr.Group
    _commit: dict[str, Any]
    _archive: zipfile.ZipFile | None
    _attrs: dict[str, Any]
    _chunk_steps: int | None
    _nodes: dict[str, zarr.Array]

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
