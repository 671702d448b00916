"""The manifest of a pack (``pack/manifest.json``): its format, the members it lists with
their sizes, and the relative paths its source entries record.

Part of the safety rules :func:`chainyard.store.packed.open_pack` applies (listed there).
"""

from __future__ import annotations

import zipfile
from pathlib import Path, PurePosixPath
from typing import Any

from chainyard.store.pack_zip import UnsafeMemberError, _json_member, name_problem

__all__ = ["MANIFEST", "PACK_FORMAT", "PACK_VERSION"]

PACK_FORMAT = "chainyard.pack"
PACK_VERSION = 1
MANIFEST = "pack/manifest.json"
#: most ``..`` parts a recorded source path may start with
_MAX_UP = 16


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
