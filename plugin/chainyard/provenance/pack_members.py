"""A pack's members against its manifest (what ``verify`` checks of a pack).

Kept apart from :mod:`chainyard.provenance.pack`, which writes packs and verifies a store
before packing it: ``verify`` needs this check, and ``pack`` needs ``verify``, so neither
imports the other through this module.
"""

from __future__ import annotations

import hashlib
import json

from chainyard.provenance.checks import Finding
from chainyard.store import Store
from chainyard.store.files import iter_stored, read_stored, stored_size
from chainyard.store.packed import MANIFEST, UnsafeMemberError, name_problem

__all__ = ["check_pack"]


def _stream_sha(store: Store, name: str) -> str:
    h = hashlib.sha256()
    for block in iter_stored(store, name):
        h.update(block)
    return h.hexdigest()


def check_pack(store: Store) -> list[Finding]:
    """A packed (or unpacked) store's members against its manifest; [] if it is no pack.

    Members are hashed in blocks (memory does not grow with their size).
    """
    try:
        raw = read_stored(store, MANIFEST, "metadata_bytes")
        if raw is None:
            return []
        manifest = json.loads(raw)
        members = manifest.get("members")
        if not isinstance(members, dict):
            raise ValueError("'members' is not an object")
    except (ValueError, AttributeError) as exc:
        return [Finding("problem", MANIFEST, f"not a valid manifest ({exc})")]
    out = []
    for name, want in sorted(members.items()):
        where = f"pack member {name}"
        problem = name_problem(name)
        if problem:
            out.append(Finding("problem", where, problem))
            continue
        if stored_size(store, name) is None:
            out.append(Finding("problem", where, "missing"))
            continue
        try:
            got = _stream_sha(store, name)
        except (UnsafeMemberError, OSError) as exc:
            out.append(Finding("problem", where, getattr(exc, "rule", None) or str(exc)))
            continue
        if not isinstance(want, dict) or got != want.get("sha256"):
            out.append(Finding("problem", where, "differs from the manifest"))
    if not out:
        out.append(Finding("ok", "pack", f"{len(members)} member(s) match the manifest"))
    return out
