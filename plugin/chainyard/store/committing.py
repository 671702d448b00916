"""The commit point of a store: the commit record written (sealed) and re-read.

:class:`Committer` is the committing half of :class:`chainyard.store.Store` (a mixin: the
store supplies ``path``, its commit record, attributes and the chunks written since the
last commit). See :mod:`chainyard.store.zarr_store` for the commit protocol.
"""

from __future__ import annotations

import json
import os
import zipfile
from pathlib import Path
from typing import Any

import zarr

from chainyard.store.faults import storage_faults
from chainyard.store.files import atomic_write_json
from chainyard.store.integrity import seal_record
from chainyard.store.layout import ATTRS_KEY, COMMIT_FILE
from chainyard.store.validate import check_commit, read_json

__all__ = ["Committer"]


class Committer:
    """Writing and re-reading a store's commit record (mixed into :class:`Store`)."""

    # provided by Store
    path: Path
    _group: zarr.Group
    _commit: dict[str, Any]
    _archive: zipfile.ZipFile | None
    _attrs: dict[str, Any]
    _written: set[int]
    _file_sums: dict[str, dict[int, str]]
    _seal_checked: bool
    steps_done: int

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
