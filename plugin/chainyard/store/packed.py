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
"""

from __future__ import annotations

import json
import math
import re
import stat
import struct
import zipfile
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import Any

import zarr

from chainyard import limits
from chainyard.errors import StoreError, UnsafeInputError
from chainyard.store.layout import COMMIT_FILE

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

PACK_FORMAT = "chainyard.pack"
PACK_VERSION = 1
MANIFEST = "pack/manifest.json"
#: read members in blocks of this many bytes
BLOCK = 1 << 20
#: members below this size are not judged by their compression ratio
_RATIO_FLOOR = 1 << 20
#: an encoded chunk may exceed its decoded size by this factor plus this many bytes
_CHUNK_SLACK = (2, 64 * 1024)
#: most ``..`` parts a recorded source path may start with
_MAX_UP = 16
_DRIVE = re.compile(r"^[A-Za-z]:")
_ITEMSIZE = {
    "bool": 1,
    "int8": 1,
    "uint8": 1,
    "int16": 2,
    "uint16": 2,
    "float16": 2,
    "int32": 4,
    "uint32": 4,
    "float32": 4,
    "int64": 8,
    "uint64": 8,
    "float64": 8,
    "complex64": 8,
    "complex128": 16,
}


class UnsafeMemberError(UnsafeInputError):
    """A pack member (or the pack itself) breaks a safety rule.

    Attributes
    ----------
    member : str
        The member named (``""`` for the pack as a whole).
    rule : str
        The rule broken, in words.
    """

    def __init__(self, where: Path, member: str, rule: str) -> None:
        self.member, self.rule = member, rule
        what = f"member {member!r}: " if member else ""
        super().__init__(f"{where}: {what}{rule}; not reading this pack")


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


def name_problem(name: str) -> str | None:
    """The rule a member name breaks (None when it is a plain relative POSIX path)."""
    if not name:
        return "empty name"
    if any(ord(c) < 32 or ord(c) == 127 for c in name):
        return "name holds a NUL or control character"
    if "\\" in name:
        return "name holds a backslash"
    if _DRIVE.match(name) or ":" in name:
        return "name holds a drive letter or ':'"
    if name.startswith("/"):
        return "absolute path"
    parts = name.rstrip("/").split("/")
    if ".." in parts:
        return "name holds '..' (would land outside the target)"
    if "." in parts or "" in parts:
        return "name holds an empty or '.' part"
    return None


def _declared_entries(path: Path) -> int | None:
    """Member count declared in the end-of-central-directory record (None if not found)."""
    size = path.stat().st_size
    with open(path, "rb") as f:
        tail_len = min(size, 22 + 65535)
        f.seek(size - tail_len)
        tail = f.read(tail_len)
        at = tail.rfind(b"PK\x05\x06")
        if at < 0 or at + 22 > len(tail):
            return None
        count = struct.unpack("<H", tail[at + 10 : at + 12])[0]
        if count != 0xFFFF or at < 20 or tail[at - 20 : at - 16] != b"PK\x06\x07":
            return int(count)
        offset = struct.unpack("<Q", tail[at - 12 : at - 4])[0]
        if offset + 56 > size:
            return None
        f.seek(offset)
        rec = f.read(56)
        if rec[:4] != b"PK\x06\x06":
            return None
        return int(struct.unpack("<Q", rec[32:40])[0])


def _member_rules(where: Path, archive: zipfile.ZipFile) -> dict[str, zipfile.ZipInfo]:
    """Names, kinds and declared sizes of every member (the rules above)."""
    infos: dict[str, zipfile.ZipInfo] = {}
    seen: set[str] = set()
    total = 0
    for info in archive.infolist():
        name = info.filename
        problem = name_problem(name)
        if problem:
            raise UnsafeMemberError(where, name, problem)
        if name in seen:
            raise UnsafeMemberError(where, name, "name occurs twice")
        seen.add(name)
        mode = info.external_attr >> 16
        kind = stat.S_IFMT(mode)
        if name.endswith("/"):
            if kind not in (0, stat.S_IFDIR) or info.file_size:
                raise UnsafeMemberError(where, name, "a folder entry holding data")
            continue
        if stat.S_ISLNK(mode):
            raise UnsafeMemberError(where, name, "a symbolic link (only regular files allowed)")
        if kind not in (0, stat.S_IFREG):
            raise UnsafeMemberError(
                where, name, f"not a regular file (mode {oct(mode)}; only regular files allowed)"
            )
        if info.flag_bits & 0x1:
            raise UnsafeMemberError(where, name, "encrypted")
        if info.compress_type not in (zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED):
            raise UnsafeMemberError(
                where, name, f"compression method {info.compress_type} (only stored or deflate)"
            )
        what = f"{where}: member {name!r}"
        limits.check("pack_member_bytes", info.file_size, what)
        if name.endswith(".json"):
            limits.check("metadata_bytes", info.file_size, what)
        if info.file_size > _RATIO_FLOOR:
            ratio = info.file_size // max(1, info.compress_size)
            limits.check("pack_ratio", ratio, what)
        total += info.file_size
        limits.check("pack_total_bytes", total, str(where))
        infos[name] = info
    for name in infos:
        parts = name.split("/")
        for i in range(1, len(parts)):
            if "/".join(parts[:i]) in infos:
                raise UnsafeMemberError(where, name, "lies below a member that is a file")
    return infos


def iter_member(
    archive: zipfile.ZipFile, info: zipfile.ZipInfo, where: Path | str
) -> Iterator[bytes]:
    """The bytes of one member in blocks of at most :data:`BLOCK`, never past its declared
    size (a member whose data is longer or damaged raises :class:`UnsafeMemberError`)."""
    left = info.file_size
    try:
        with archive.open(info) as f:
            while True:
                block = f.read(min(BLOCK, left + 1))
                if not block:
                    break
                left -= len(block)
                if left < 0:
                    raise UnsafeMemberError(
                        Path(where), info.filename, "holds more data than its declared size"
                    )
                yield block
    except (zipfile.BadZipFile, EOFError, zlib.error, OSError, ValueError) as exc:
        text = " ".join(str(exc).split())[:120]
        raise UnsafeMemberError(Path(where), info.filename, f"unreadable ({text})") from None
    if left:
        raise UnsafeMemberError(Path(where), info.filename, "shorter than its declared size")


def read_member(
    archive: zipfile.ZipFile, info: zipfile.ZipInfo, where: Path | str, limit: str
) -> bytes:
    """A whole member, after checking its declared size against the limit named ``limit``."""
    limits.check(limit, info.file_size, f"{where}: member {info.filename!r}")
    return b"".join(iter_member(archive, info, where))


def _json_member(
    archive: zipfile.ZipFile, infos: dict[str, zipfile.ZipInfo], where: Path, name: str
) -> Any:
    try:
        return json.loads(read_member(archive, infos[name], where, "metadata_bytes"))
    except ValueError as exc:
        raise UnsafeMemberError(where, name, f"not valid JSON ({exc})") from None


def _manifest_rules(
    where: Path, archive: zipfile.ZipFile, infos: dict[str, zipfile.ZipInfo]
) -> dict[str, Any]:
    if MANIFEST not in infos:
        raise UnsafeMemberError(
            where, MANIFEST, "missing: not written by `chainyard pack`, members cannot be checked"
        )
    manifest = _json_member(archive, infos, where, MANIFEST)
    if not isinstance(manifest, dict) or manifest.get("format") != PACK_FORMAT:
        raise UnsafeMemberError(where, MANIFEST, f"not a {PACK_FORMAT} manifest")
    if manifest.get("format_version") != PACK_VERSION:
        raise UnsafeMemberError(
            where,
            MANIFEST,
            f"pack format version {manifest.get('format_version')!r} is not supported "
            f"(this chainyard reads version {PACK_VERSION})",
        )
    members = manifest.get("members")
    if not isinstance(members, dict):
        raise UnsafeMemberError(where, MANIFEST, "'members' is not an object")
    for name, entry in sorted(members.items()):
        problem = name_problem(name)
        if problem:
            raise UnsafeMemberError(where, name, f"listed in the manifest: {problem}")
        if (
            not isinstance(entry, dict)
            or not isinstance(entry.get("sha256"), str)
            or not isinstance(entry.get("size"), int)
        ):
            raise UnsafeMemberError(where, name, "manifest entry lacks sha256 and size")
        if name not in infos:
            raise UnsafeMemberError(where, name, "listed in the manifest but missing from the zip")
        if entry["size"] != infos[name].file_size:
            raise UnsafeMemberError(
                where,
                name,
                f"declared size {infos[name].file_size:,} differs from the manifest's "
                f"{entry['size']:,}",
            )
    for name in sorted(infos):
        if name != MANIFEST and name not in members:
            raise UnsafeMemberError(where, name, "not listed in the manifest")
    for key in ("sources", "records"):
        entries = manifest.get(key, [])
        if not isinstance(entries, list):
            raise UnsafeMemberError(where, MANIFEST, f"'{key}' is not a list")
        for entry in entries:
            member = entry.get("member") if isinstance(entry, dict) else None
            if member not in members:
                raise UnsafeMemberError(
                    where, str(member), f"named in the manifest's {key} but not a member"
                )
            if key == "sources":
                _source_path_rule(where, member, entry.get("path"))
    return manifest


def _source_path_rule(where: Path, member: str, recorded: Any) -> None:
    """A source's recorded path must be relative and plain (it is written below a folder)."""
    text = recorded if isinstance(recorded, str) else ""
    parts = PurePosixPath(text).parts
    ups = 0
    while ups < len(parts) and parts[ups] == "..":
        ups += 1
    bad = (
        not text
        or text.startswith("/")
        or any(ord(c) < 32 for c in text)
        or "\\" in text
        or ":" in text
        or ".." in parts[ups:]
        or ups > _MAX_UP
    )
    if bad:
        raise UnsafeMemberError(
            where,
            member,
            f"its recorded path {recorded!r} is not a plain relative path (at most {_MAX_UP} "
            "leading '..')",
        )


def declared_chunk_bytes(meta: dict[str, Any], what: str) -> int:
    """Decoded bytes of one chunk of the array described by zarr metadata ``meta``, checked
    against the ``chunk_bytes`` limit (``what`` names the file in the message).

    Raises
    ------
    ValueError
        If the metadata has no readable ``chunk_shape`` and ``data_type`` (the message says
        which); :class:`~chainyard.errors.LimitExceededError` above the limit.
    """
    try:
        shape = meta["chunk_grid"]["configuration"]["chunk_shape"]
        dims = [int(n) for n in shape]
        itemsize = _ITEMSIZE[str(meta["data_type"])]
    except (KeyError, TypeError, ValueError):
        raise ValueError("array metadata without a readable chunk_shape and data_type") from None
    if any(n < 1 for n in dims):
        raise ValueError(f"chunk_shape {dims} has a size below 1")
    nbytes = math.prod(dims) * itemsize
    limits.check("chunk_bytes", nbytes, f"{what} (chunk_shape {dims})")
    return nbytes


def most_chunk_file_bytes(chunk_bytes: int) -> int:
    """Largest stored (encoded) size accepted for a chunk of ``chunk_bytes`` decoded bytes."""
    return _CHUNK_SLACK[0] * chunk_bytes + _CHUNK_SLACK[1]


def _chunk_rules(where: Path, archive: zipfile.ZipFile, infos: dict[str, zipfile.ZipInfo]) -> None:
    """Declared chunk sizes within ``chunk_bytes``; chunk members no larger than a chunk."""
    arrays: dict[str, int] = {}
    for name in sorted(infos):
        if not name.endswith("/zarr.json") or name.startswith("pack/"):
            continue
        meta = _json_member(archive, infos, where, name)
        if not isinstance(meta, dict) or meta.get("node_type") != "array":
            continue
        try:
            nbytes = declared_chunk_bytes(meta, f"{where}: {name}")
        except ValueError as exc:
            raise UnsafeMemberError(where, name, str(exc)) from None
        arrays[name[: -len("zarr.json")]] = nbytes
    for name, info in infos.items():
        prefix = name.rsplit("/c/", 1)[0] + "/" if "/c/" in name else None
        if prefix in arrays:
            most = most_chunk_file_bytes(arrays[prefix])
            if info.file_size > most:
                raise UnsafeMemberError(
                    where,
                    name,
                    f"{info.file_size:,} bytes, more than a chunk of this array can hold "
                    f"encoded ({most:,})",
                )


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
