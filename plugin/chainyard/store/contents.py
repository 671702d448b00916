"""Which files inside a store chainyard wrote, and which it did not (``verify`` lists, ``pack``
refuses).

A store holds exactly: ``zarr.json`` and ``commit.json``; the group metadata ``draws/``,
``start/`` (and ``.../blob/`` with blobs); every array's ``zarr.json`` and chunk files named
by its chunk key encoding, at most as many chunks as its declared shape holds; and, in a store
that came out of ``chainyard unpack``, ``pack/manifest.json`` with the members it lists.
Besides these, only two kinds of files are tolerated, and neither is packed:

* temporary files of an interrupted write (``.NAME.PID.tmp``, ``.NAME.PID.partial``);
* the empty ``.snakemake_timestamp`` Snakemake may put into a folder it produced.

Everything else is *unknown* (for example a stray ``evil.py``). Symbolic links (to files or
folders) and special files (FIFOs, devices, sockets) are listed apart: chainyard writes none,
and following them would read or ship something from outside the store.
"""

from __future__ import annotations

import json
import os
import re
import stat
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from chainyard.store.integrity import chunk_key_from_metadata
from chainyard.store.layout import BLOB, COMMIT_FILE, DRAWS, START

if TYPE_CHECKING:  # pragma: no cover
    from chainyard.store.zarr_store import Store

__all__ = ["StoreContents", "scan_store"]

_LEFTOVER = re.compile(r"^\..+\.\d+\.(tmp|partial)$")
_TIMESTAMP = ".snakemake_timestamp"
_MANIFEST = "pack/manifest.json"
_CHUNK_INDEX = re.compile(r"^(?:c[/.])?(\d+)(?:[/.]|$)")


@dataclass
class StoreContents:
    """The files found inside a store (relative POSIX paths, sorted).

    Attributes
    ----------
    known : list of str
        Files chainyard writes (metadata, chunks, the extras of an unpacked pack).
    unknown : list of str
        Regular files chainyard did not write.
    links : list of str
        Symbolic links (to files or folders); folders behind them are not entered.
    special : list of str
        FIFOs, devices and sockets.
    tolerated : list of str
        Leftover temporary files and Snakemake's timestamp (never packed).
    """

    known: list[str] = field(default_factory=list)
    unknown: list[str] = field(default_factory=list)
    links: list[str] = field(default_factory=list)
    special: list[str] = field(default_factory=list)
    tolerated: list[str] = field(default_factory=list)


def _pack_members(store: Store) -> set[str]:
    """Members listed by ``pack/manifest.json`` of an unpacked store (empty if none)."""
    from chainyard.store.files import read_stored

    try:
        raw = read_stored(store, _MANIFEST, "metadata_bytes")
        members = json.loads(raw).get("members") if raw is not None else None
    except (ValueError, AttributeError, OSError):
        return set()
    return set(members) if isinstance(members, dict) else set()


class _Layout:
    """The names chainyard writes in one store."""

    def __init__(self, store: Store) -> None:
        nodes = [f"{DRAWS}/{n}" for n in store.array_names()]
        nodes += [f"{START}/{n}" for n in store.start_names()]
        self.metadata = {"zarr.json", COMMIT_FILE, f"{DRAWS}/zarr.json", f"{START}/zarr.json"}
        if store.blob_names:
            self.metadata |= {f"{DRAWS}/{BLOB}/zarr.json", f"{START}/{BLOB}/zarr.json"}
        self.metadata |= {f"{node}/zarr.json" for node in nodes}
        self.arrays: dict[str, dict[str, Any]] = {
            node: store._info[node].meta for node in nodes if node in store._info
        }
        self.pack = _pack_members(store)

    def is_chunk(self, name: str) -> bool:
        for node, meta in self.arrays.items():
            if not name.startswith(f"{node}/"):
                continue
            found = _CHUNK_INDEX.match(name[len(node) + 1 :])
            if found is None:
                return False
            index = int(found.group(1))
            try:
                size = int(meta["chunk_grid"]["configuration"]["chunk_shape"][0])
                chunks = -(-int(meta["shape"][0]) // size) if meta["shape"] else 1
            except (KeyError, TypeError, ValueError, IndexError, ZeroDivisionError):
                return False
            return index < max(chunks, 1) and name == chunk_key_from_metadata(node, meta, index)
        return False

    def kind(self, name: str, size: int) -> str:
        """``known``, ``tolerated`` or ``unknown`` for a regular file ``name`` of ``size``."""
        base = name.rsplit("/", 1)[-1]
        if name in self.metadata or self.is_chunk(name):
            return "known"
        if name.startswith("pack/") and (name == _MANIFEST or name in self.pack):
            return "known"
        if _LEFTOVER.match(base) or (name == _TIMESTAMP and size == 0):
            return "tolerated"
        return "unknown"


def scan_store(store: Store) -> StoreContents:
    """Every file inside ``store`` (a folder or a pack), sorted into :class:`StoreContents`.

    A folder is walked without following links (``lstat`` only; nothing is opened); a pack's
    member list is used as it is (its rules already refuse links and special members).
    """
    layout = _Layout(store)
    out = StoreContents()
    if store.archive is not None:
        for info in store.archive.infolist():
            if not info.filename.endswith("/"):
                name = info.filename
                getattr(out, layout.kind(name, info.file_size)).append(name)
        out.known.sort()
        out.unknown.sort()
        out.tolerated.sort()
        return out
    root = Path(store.path)
    for folder, dirs, files in os.walk(root, followlinks=False):
        rel = Path(folder).relative_to(root)
        for d in list(dirs):
            if os.path.islink(os.path.join(folder, d)):
                out.links.append((rel / d).as_posix())
                dirs.remove(d)
        dirs.sort()
        for f in sorted(files):
            name = (rel / f).as_posix()
            try:
                st = os.lstat(os.path.join(folder, f))
            except FileNotFoundError:  # removed while walking (a writer's temporary file)
                continue
            if stat.S_ISLNK(st.st_mode):
                out.links.append(name)
            elif not stat.S_ISREG(st.st_mode):
                out.special.append(name)
            else:
                getattr(out, layout.kind(name, st.st_size)).append(name)
    for names in (out.known, out.unknown, out.links, out.special, out.tolerated):
        names.sort()
    return out
