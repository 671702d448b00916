"""Packs (zip files written by ``chainyard pack``): the safety rules every reader applies
first, bounded reading of members, and opening a packed store (read-only).

A pack comes from elsewhere, so nothing in it is trusted until :func:`open_pack` has checked
it. The rules (one function for every reader: verify, inspect, unpack, export-prov and any
packed store opened through :class:`~chainyard.store.Store`):

* the file is a zip whose declared member count is within ``pack_members`` (checked in the
  end-of-central-directory record before the member list is parsed);
* every member name is a plain relative POSIX path: not empty, no ``..``, ``.`` or empty
  part, not absolute, no backslash, no drive letter or other ``:``, no NUL or other control
  character; no name occurs twice;
* every member is a regular file (zip external attributes: no symlink, device or FIFO),
  neither encrypted nor compressed with anything but stored/deflate;
* declared sizes are within limits (:mod:`chainyard.limits`): each member
  (``pack_member_bytes``), all together (``pack_total_bytes``), each JSON member
  (``metadata_bytes``), the compression ratio of members above 1 MiB (``pack_ratio``);
* ``pack/manifest.json`` exists, is JSON, lists exactly the other members with their sizes,
  and its source entries name relative paths;
* every array's declared chunk (chunk shape x item size) is within ``chunk_bytes`` and no
  chunk member is larger than such a chunk can be when encoded.

Members are then read in blocks (:func:`iter_member`), never past their declared size.

This module opens packs and packed stores; the rules live in :mod:`~chainyard.store.pack_zip`
(the zip and its members, bounded reads), :mod:`~chainyard.store.pack_manifest` and
:mod:`~chainyard.store.pack_chunks`, and their public names are re-exported here.
"""

from __future__ import annotations

import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import zarr

from chainyard import limits
from chainyard.errors import StoreError
from chainyard.store.layout import COMMIT_FILE
from chainyard.store.pack_chunks import _chunk_rules, declared_chunk_bytes, most_chunk_file_bytes
from chainyard.store.pack_manifest import MANIFEST, PACK_FORMAT, PACK_VERSION, _manifest_rules
from chainyard.store.pack_zip import (
    UnsafeMemberError,
    _declared_entries,
    _json_member,
    _member_rules,
    iter_member,
    name_problem,
    read_member,
)

__all__ = [
    "MANIFEST",
    "PACK_FORMAT",
    "PACK_VERSION",
    "PackIndex",
    "UnsafeMemberError",
    "declared_chunk_bytes",
    "iter_member",
    "most_chunk_file_bytes",
    "name_problem",
    "open_pack",
    "open_packed",
    "read_member",
]


@dataclass
class PackIndex:
    """A pack that passed the rules: its regular members and its manifest.

    Attributes
    ----------
    path : Path
        The zip file.
    infos : dict of str to ZipInfo
        Every regular member by name (directory entries left out).
    manifest : dict
        ``pack/manifest.json`` parsed.
    """

    path: Path
    infos: dict[str, zipfile.ZipInfo]
    manifest: dict[str, Any]


def open_pack(path: str | Path) -> tuple[zipfile.ZipFile, PackIndex]:
    """Open a pack and apply every safety rule (module docstring) before anything is read.

    Returns
    -------
    archive : ZipFile
        The open zip file (the caller closes it).
    index : PackIndex
        Its regular members and manifest.

    Raises
    ------
    StoreError
        If the file is empty, not a zip or its member list is unreadable (exit 4).
    UnsafeMemberError
        If a member or the manifest breaks a rule (names the member and the rule).
    LimitExceededError
        If a declared size or count is above a limit of :mod:`chainyard.limits`.
    """
    path = Path(path)
    try:
        if path.stat().st_size == 0:
            raise StoreError(f"{path}: not a chainyard store or pack: empty file")
        declared = _declared_entries(path)
    except OSError as exc:
        raise StoreError(f"{path}: cannot be read ({exc.strerror or exc})") from None
    if declared is None:
        raise StoreError(f"{path}: not a chainyard store or pack: not a zip file (or truncated)")
    limits.check("pack_members", declared, str(path))
    try:
        archive = zipfile.ZipFile(path)
    except (zipfile.BadZipFile, OSError, ValueError, EOFError) as exc:
        raise StoreError(
            f"{path}: not a chainyard store or pack: not a readable zip file ({exc})"
        ) from None
    try:
        limits.check("pack_members", len(archive.infolist()), str(path))
        infos = _member_rules(path, archive)
        manifest = _manifest_rules(path, archive, infos)
        _chunk_rules(path, archive, infos)
    except BaseException:
        archive.close()
        raise
    return archive, PackIndex(path, infos, manifest)


def open_packed(
    path: Path, *, writable: bool
) -> tuple[dict[str, Any], zarr.Group, zipfile.ZipFile]:
    """Commit record, zarr group and open zip file of a packed store (after the rules).

    Raises
    ------
    StoreError
        If the file is not a pack holding a chainyard store, or ``writable`` is asked for;
        :class:`UnsafeMemberError` or :class:`~chainyard.errors.LimitExceededError` from
        :func:`open_pack`.
    """
    if writable:
        raise StoreError(
            f"{path}: is a packed store (read-only); unpack it (`chainyard unpack`) to write to it"
        )
    from zarr.storage import ZipStore

    archive, index = open_pack(path)
    try:
        if COMMIT_FILE not in index.infos:
            raise StoreError(f"{path}: not a chainyard store (no {COMMIT_FILE})")
        commit = _json_member(archive, index.infos, path, COMMIT_FILE)
        if not isinstance(commit, dict):
            raise UnsafeMemberError(path, COMMIT_FILE, "not a JSON object")
        try:
            group = zarr.open_group(ZipStore(path, mode="r"), mode="r")
        except Exception as exc:
            text = " ".join(str(exc).split())[:160]
            raise StoreError(f"{path}: cannot open as a zarr group ({text})") from None
    except BaseException:
        archive.close()
        raise
    return commit, group, archive
