"""Single-file archives of a store (format ``chainyard.pack``, version 1), and unpacking.

A pack is a zip file whose root *is* the zarr store (every file of the store directory, byte
for byte), so :func:`chainyard.open_store` reads it directly, plus a folder ``pack/``::

    pack/manifest.json         format, creation, the store's digest, SHA-256 and size of
                               every other member, the sources and records it holds
    pack/provenance.json       the provenance record (chainyard.provenance v1)
    pack/provenance.prov.json  the same as W3C PROV-JSON
    pack/config.json           the normalised run configuration
    pack/sources/PATH          model source(s), data, loader, initial positions (PATH as
                               recorded, ``..`` written as ``__up__``)
    pack/records/N-NAME.json   decision and diagnostics records

Packing refuses a store holding a symbolic link, a special file or a file chainyard did not
write (exit 4; see :mod:`chainyard.store.contents`), a store that fails verification, or whose
model or data files no longer match their recorded hashes (``include_sources=False`` leaves
them out), and an output that is the store itself, inside it or inside any other store, an
existing folder, or an existing file that is not a chainyard pack (an existing pack is
replaced atomically). Every reader applies
the safety rules of :func:`chainyard.store.packed.open_pack` first; unpacking then copies each
member in blocks, checking it against the manifest.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import shutil
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import Any

from chainyard import testhooks
from chainyard.errors import StorageFaultError, StoreError, UnsafeInputError, VerificationError
from chainyard.provenance import utc_now
from chainyard.provenance.chunks import is_file_reference
from chainyard.provenance.pack_members import check_pack
from chainyard.provenance.record import file_digest, provenance_record, store_digest
from chainyard.store import Store
from chainyard.store.contents import scan_store
from chainyard.store.layout import COMMIT_FILE
from chainyard.store.packed import (
    MANIFEST,
    PACK_FORMAT,
    PACK_VERSION,
    UnsafeMemberError,
    iter_member,
    open_pack,
)

__all__ = ["PACK_FORMAT", "PACK_VERSION", "PackInfo", "check_pack", "pack_store", "unpack_store"]

_FIXED_TIME = (1980, 1, 1, 0, 0, 0)
#: system errors that mean the file system refused the write (exit 8)
_STORAGE_ERRNOS = {errno.ENOSPC, errno.EROFS, errno.EFBIG, errno.EDQUOT, errno.EIO, errno.EACCES}


@dataclass
class PackInfo:
    """What :func:`pack_store` wrote: the archive, its SHA-256 and its member count."""

    path: Path
    sha256: str
    members: int
    store_digest: str


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _member_for(recorded: str) -> str:
    parts = [
        "__up__" if p == ".." else p for p in PurePosixPath(recorded).parts if p not in ("/", ".")
    ]
    return "pack/sources/" + "/".join(parts)


def _sources(store: Store) -> list[tuple[dict[str, Any], bytes]]:
    """(manifest entry, bytes) of every recorded model/data file, checked against its hash."""
    attrs = store.attrs
    ident = attrs.get("identity") or {}
    base = Path(str(attrs.get("config_dir", ".")))
    refs = [(k, ident.get(k)) for k in ("model_source", "data", "data_loader", "initial_positions")]
    refs += [("extra_sources", r) for r in ident.get("extra_sources") or []]
    out = []
    for role, ref in refs:
        if not ref:
            continue
        recorded = str(ref["path"])
        if role in ("model_source", "data_loader") and not is_file_reference(recorded):
            continue  # an importable module: not a file of this run
        path = Path(recorded) if Path(recorded).is_absolute() else base / recorded
        entry = {
            "role": role,
            "path": recorded,
            "member": _member_for(recorded),
            "sha256": ref.get("sha256"),
        }
        data = path.read_bytes() if path.is_file() else store.read_bytes(entry["member"])
        if data is None:
            raise VerificationError(
                f"{store.path}: {role} file {path} not found; restore it or pack without "
                "sources (--no-sources)"
            )
        if _sha(data) != ref.get("sha256"):
            raise VerificationError(
                f"{store.path}: {role} file {path} has changed since sampling (sha256 recorded "
                f"{str(ref.get('sha256'))[:12]}, now {_sha(data)[:12]}); restore it or pack "
                "without sources (--no-sources)"
            )
        out.append((entry, data))
    return out


def _records(store: Store, extra: Sequence[str | Path]) -> list[tuple[dict[str, Any], bytes]]:
    refs = [Path(str(r["path"])) for r in (store.attrs.get("derived") or {}).get("records", [])]
    wanted = {r.get("sha256") for r in (store.attrs.get("derived") or {}).get("records", [])}
    paths = [p for p in refs if p.is_file() and file_digest(p) in wanted]
    paths += [Path(p) for p in extra]
    out, seen = [], set()
    for i, p in enumerate(paths):
        try:
            data = p.read_bytes()
            kind = json.loads(data).get("kind")
        except (OSError, ValueError, AttributeError) as exc:
            raise StoreError(f"{p}: not a readable JSON record ({exc})") from None
        if _sha(data) in seen:
            continue
        seen.add(_sha(data))
        entry = {
            "member": f"pack/records/{i}-{p.name}",
            "path": str(p),
            "kind": kind,
            "sha256": _sha(data),
        }
        out.append((entry, data))
    return out


def _store_files(store: Store) -> list[tuple[str, Path]]:
    """The store's own files to pack (relative name, path), after refusing what it must not
    ship: symbolic links, special files and files chainyard did not write (exit 4)."""
    found = scan_store(store)
    refused = [
        (
            found.links,
            "symbolic link(s) inside the store; pack ships no links (copy what they "
            "point to into the store, or remove them)",
        ),
        (found.special, "special file(s) (FIFO, device or socket); remove them"),
        (
            found.unknown,
            "file(s) not written by chainyard; remove them or move them out of the store",
        ),
    ]
    for names, why in refused:
        if names:
            shown = ", ".join(names[:5]) + (f" and {len(names) - 5} more" if len(names) > 5 else "")
            raise UnsafeInputError(f"{store.path}: {shown}: {why}; nothing was packed")
    return [(n, store.path / n) for n in found.known if not n.startswith("pack/")]


def _is_store_dir(path: Path) -> bool:
    """Whether ``path`` is a chainyard (or any zarr) store folder."""
    return (path / COMMIT_FILE).is_file() or (path / "zarr.json").is_file()


def _is_chainyard_pack(path: Path) -> bool:
    """Whether the existing file ``path`` is a pack (zip with a chainyard pack manifest)."""
    try:
        with zipfile.ZipFile(path) as z:
            info = z.getinfo(MANIFEST)
            if info.file_size > 2**20 * 64:
                return False
            manifest = json.loads(z.read(info))
    except (OSError, KeyError, ValueError, zipfile.BadZipFile, EOFError):
        return False
    return isinstance(manifest, dict) and manifest.get("format") == PACK_FORMAT


def check_output(store_path: Path, out: Path) -> bool:
    """Refuse a pack output that would damage something; True if it replaces a pack.

    Refused (:class:`~chainyard.errors.UnsafeInputError`, exit 4): the store itself, a path
    inside it or inside any other store, an existing folder, an existing file that is not a
    chainyard pack.
    """
    src, dst = store_path.resolve(), out.resolve()
    if dst == src:
        raise UnsafeInputError(f"{out}: is the store being packed; write the pack elsewhere")
    if dst.is_relative_to(src):
        raise UnsafeInputError(
            f"{out}: is inside the store being packed ({store_path}); write the pack elsewhere"
        )
    for parent in dst.parents:
        if _is_store_dir(parent):
            raise UnsafeInputError(
                f"{out}: is inside the store {parent}; write the pack outside any store"
            )
    if dst.is_dir():
        raise UnsafeInputError(f"{out}: is an existing folder; give a file name for the pack")
    if os.path.lexists(out):
        if dst.is_file() and _is_chainyard_pack(dst):
            return True
        raise UnsafeInputError(
            f"{out}: exists and is not a chainyard pack; remove it or choose another name"
        )
    return False


def _copy_hashed(src: Path, dst: Any) -> tuple[str, int]:
    """Copy file ``src`` into the open writable ``dst`` in blocks; (sha256, size)."""
    h, size = hashlib.sha256(), 0
    with open(src, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
            size += len(block)
            if dst is not None:
                dst.write(block)
    return h.hexdigest(), size


def _zip_info(name: str) -> zipfile.ZipInfo:
    info = zipfile.ZipInfo(name, date_time=_FIXED_TIME)
    text = name.endswith((".json", ".py", ".csv", ".yaml"))
    info.compress_type = zipfile.ZIP_DEFLATED if text else zipfile.ZIP_STORED
    info.external_attr = 0o100644 << 16
    return info


def pack_store(
    store_path: str | Path,
    out: str | Path,
    *,
    records: Sequence[str | Path] = (),
    include_sources: bool = True,
) -> PackInfo:
    """Write a store, its records, provenance, config and sources into one zip file.

    The pack is written to a temporary file beside ``out`` and renamed over it at the end.

    Parameters
    ----------
    store_path : str or Path
        A store directory (sampled or derived).
    out : str or Path
        The archive to write: a new file, or an existing chainyard pack (replaced).
    records : sequence of path
        Further JSON records to include (e.g. diagnostics); the decision records a derived
        store names are included when found with a matching hash.
    include_sources : bool
        Include the model source(s) and data files (checked against their recorded hashes).

    Raises
    ------
    UnsafeInputError
        If ``out`` is the store, inside it or inside another store, an existing folder, or an
        existing file that is not a chainyard pack.
    """
    from chainyard.provenance.prov_json import prov_json
    from chainyard.provenance.verify import verify_store

    store = Store.open(store_path)
    if store.packed:
        raise StoreError(f"{store.path}: is already a packed store")
    out = Path(out)
    check_output(store.path, out)
    files = dict(_store_files(store))
    report = verify_store(store, chain=False)
    if not report.ok:  # a damaged store (exit 4, as every reader refuses one)
        raise StoreError(
            f"{store.path}: fails verification ({len(report.problems)} problem(s); first: "
            f"{report.problems[0]}); see `chainyard verify`"
        )
    record = provenance_record(store)
    extras: dict[str, bytes] = {
        "pack/provenance.json": json.dumps(record, indent=1, sort_keys=True).encode(),
        "pack/provenance.prov.json": prov_json(record).encode(),
        "pack/config.json": json.dumps(store.attrs["config"], indent=1, sort_keys=True).encode(),
    }
    sources = _sources(store) if include_sources else []
    recs = _records(store, records)
    for entry, data in [*sources, *recs]:
        extras[entry["member"]] = data
    listing = {n: {"sha256": _sha(d), "size": len(d)} for n, d in extras.items()}
    for name, path in files.items():
        sha, size = _copy_hashed(path, None)
        listing[name] = {"sha256": sha, "size": size}
    manifest = {
        "format": PACK_FORMAT,
        "format_version": PACK_VERSION,
        "created_utc": utc_now(),
        "chainyard": (record["generated_by"].get("software") or {}).get("chainyard"),
        "store": {
            "digest": store_digest(store),
            "steps_done": store.steps_done,
            "replica": store.replica,
            "kind": record["subject"]["kind"],
        },
        "members": dict(sorted(listing.items())),
        "sources": [e for e, _ in sources],
        "records": [e for e, _ in recs],
    }
    extras[MANIFEST] = json.dumps(manifest, indent=1, sort_keys=True).encode()
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.{os.getpid()}.tmp")
    try:
        with zipfile.ZipFile(tmp, "w") as z:
            for name in sorted([*files, *extras]):
                big = name in files and listing[name]["size"] > 2**30
                with z.open(_zip_info(name), "w", force_zip64=big) as dst:
                    if name in extras:
                        dst.write(extras[name])
                        continue
                    sha, _ = _copy_hashed(files[name], dst)
                    if sha != listing[name]["sha256"]:
                        raise StoreError(f"{files[name]}: changed while it was being packed")
        with open(tmp, "rb") as f:
            os.fsync(f.fileno())
        testhooks.instant("pack-before-publish")
        os.replace(tmp, out)
    except BaseException as exc:
        tmp.unlink(missing_ok=True)
        if isinstance(exc, OSError) and exc.errno in _STORAGE_ERRNOS:
            name = errno.errorcode.get(exc.errno or 0, str(exc.errno))
            raise StorageFaultError(
                f"{out}: the file system refused writing the pack ({exc.strerror} [{name}]); "
                f"{out} was not changed"
            ) from None
        raise
    return PackInfo(out, file_digest(out), len(files) + len(extras), manifest["store"]["digest"])


def unpack_store(pack: str | Path, out: str | Path) -> Path:
    """Extract a pack into the directory ``out`` (a store, with the extras under ``pack/``).

    The pack passes :func:`~chainyard.store.packed.open_pack` first; members are copied in
    blocks into a temporary folder beside ``out``, renamed to ``out`` once all match.

    Raises
    ------
    StoreError
        If ``pack`` is not a chainyard pack or ``out`` already exists (exit 4).
    UnsafeInputError, LimitExceededError
        If the pack breaks a safety rule or a limit (exit 4); nothing is written.
    VerificationError
        If a member differs from the manifest (exit 7); nothing is left behind.
    """
    pack, out = Path(pack), Path(out)
    if os.path.lexists(out):
        raise StoreError(f"{out}: already exists; unpack into a new directory")
    from chainyard.engine.guards import refuse_inside_store

    refuse_inside_store(out, "unpacked store")
    archive, index = open_pack(pack)
    tmp = out.with_name(f".{out.name}.{os.getpid()}.partial")
    root = tmp.resolve()
    try:
        with archive:
            for name in sorted(index.manifest["members"]):
                dest = tmp / name
                if not dest.resolve().is_relative_to(root):  # the rules make this impossible
                    raise UnsafeMemberError(pack, name, "would land outside the target")
                dest.parent.mkdir(parents=True, exist_ok=True)
                h = hashlib.sha256()
                with open(dest, "xb") as f:
                    for block in iter_member(archive, index.infos[name], pack):
                        h.update(block)
                        f.write(block)
                if h.hexdigest() != index.manifest["members"][name]["sha256"]:
                    raise VerificationError(
                        f"{pack}: member {name} differs from the manifest; not unpacking"
                    )
            with open(tmp / MANIFEST, "xb") as f:
                for block in iter_member(archive, index.infos[MANIFEST], pack):
                    f.write(block)
        os.replace(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out
