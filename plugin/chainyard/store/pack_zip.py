"""The zip container of a pack: the rules on its members (count, names, kinds, declared
sizes) and bounded reading of members, never past their declared size.

Part of the safety rules :func:`chainyard.store.packed.open_pack` applies (listed there).
"""

from __future__ import annotations

import json
import re
import stat
import struct
import zipfile
import zlib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from chainyard import limits
from chainyard.errors import UnsafeInputError

__all__ = ["UnsafeMemberError", "iter_member", "name_problem", "read_member"]

#: read members in blocks of this many bytes
BLOCK = 1 << 20
#: members below this size are not judged by their compression ratio
_RATIO_FLOOR = 1 << 20
_DRIVE = re.compile(r"^[A-Za-z]:")


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
