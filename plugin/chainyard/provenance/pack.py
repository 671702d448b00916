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

Packing refuses a store that fails verification, or whose model or data files no longer
match their recorded hashes (``include_sources=False`` leaves them out). Unpacking checks
every member against the manifest and refuses unsafe member names.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import Any

from chainyard.errors import StoreError, VerificationError
from chainyard.provenance import utc_now
from chainyard.provenance.checks import Finding
from chainyard.provenance.chunks import is_file_reference
from chainyard.provenance.record import file_digest, provenance_record, store_digest
from chainyard.store import Store

__all__ = ["PACK_FORMAT", "PACK_VERSION", "PackInfo", "check_pack", "pack_store", "unpack_store"]

PACK_FORMAT = "chainyard.pack"
PACK_VERSION = 1
MANIFEST = "pack/manifest.json"
_FIXED_TIME = (1980, 1, 1, 0, 0, 0)


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
    out = []
    for root, dirs, files in os.walk(store.path):
        rel = Path(root).relative_to(store.path)
        if rel.parts[:1] == ("pack",):
            continue
        dirs.sort()
        for f in sorted(files):
            if not f.endswith((".tmp", ".partial", ".lock")):
                out.append(((rel / f).as_posix(), Path(root) / f))
    return out


def pack_store(
    store_path: str | Path,
    out: str | Path,
    *,
    records: Sequence[str | Path] = (),
    include_sources: bool = True,
) -> PackInfo:
    """Write a store, its records, provenance, config and sources into one zip file.

    Parameters
    ----------
    store_path : str or Path
        A store directory (sampled or derived).
    out : str or Path
        The archive to write (replaced atomically).
    records : sequence of path
        Further JSON records to include (e.g. diagnostics); the decision records a derived
        store names are included when found with a matching hash.
    include_sources : bool
        Include the model source(s) and data files (checked against their recorded hashes).
    """
    from chainyard.provenance.prov_json import prov_json
    from chainyard.provenance.verify import verify_store

    store = Store.open(store_path)
    if store.packed:
        raise StoreError(f"{store.path}: is already a packed store")
    report = verify_store(store, chain=False)
    if not report.ok:
        raise VerificationError(
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
    files = _store_files(store)
    members = {name: path.read_bytes() for name, path in files}
    members.update(extras)
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
        "members": {n: {"sha256": _sha(d), "size": len(d)} for n, d in sorted(members.items())},
        "sources": [e for e, _ in sources],
        "records": [e for e, _ in recs],
    }
    members[MANIFEST] = json.dumps(manifest, indent=1, sort_keys=True).encode()
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.{os.getpid()}.tmp")
    with zipfile.ZipFile(tmp, "w") as z:
        for name in sorted(members):
            info = zipfile.ZipInfo(name, date_time=_FIXED_TIME)
            text = name.endswith((".json", ".py", ".csv", ".yaml"))
            info.compress_type = zipfile.ZIP_DEFLATED if text else zipfile.ZIP_STORED
            info.external_attr = 0o644 << 16
            z.writestr(info, members[name])
    os.replace(tmp, out)
    return PackInfo(out, file_digest(out), len(members), manifest["store"]["digest"])


def _safe(name: str) -> bool:
    p = PurePosixPath(name)
    return not (p.is_absolute() or ".." in p.parts or "\\" in name or ":" in name or not name)


def _manifest(archive: zipfile.ZipFile, where: Path) -> dict[str, Any]:
    try:
        manifest = json.loads(archive.read(MANIFEST))
    except KeyError:
        raise StoreError(f"{where}: not a chainyard pack (no {MANIFEST})") from None
    except ValueError as exc:
        raise VerificationError(f"{where}: {MANIFEST} is not JSON ({exc})") from None
    if manifest.get("format") != PACK_FORMAT or manifest.get("format_version") != PACK_VERSION:
        raise StoreError(f"{where}: pack format {manifest.get('format_version')} not supported")
    return manifest


def check_pack(store: Store) -> list[Finding]:
    """A packed (or unpacked) store's members against its manifest; [] if it is no pack."""
    raw = store.read_bytes(MANIFEST)
    if raw is None:
        return []
    members = json.loads(raw).get("members", {})
    out = []
    for name, want in sorted(members.items()):
        data = store.read_bytes(name)
        if data is None:
            out.append(Finding("problem", f"pack member {name}", "missing"))
        elif _sha(data) != want.get("sha256"):
            out.append(Finding("problem", f"pack member {name}", "differs from the manifest"))
    if not out:
        out.append(Finding("ok", "pack", f"{len(members)} member(s) match the manifest"))
    return out


def unpack_store(pack: str | Path, out: str | Path) -> Path:
    """Extract a pack into the directory ``out`` (a store, with the extras under ``pack/``).

    Raises
    ------
    StoreError
        If ``pack`` is not a chainyard pack or ``out`` already exists.
    VerificationError
        If a member is unsafe, missing or differs from the manifest.
    """
    pack, out = Path(pack), Path(out)
    if not zipfile.is_zipfile(pack):
        raise StoreError(f"{pack}: not a zip file (not a chainyard pack)")
    if out.exists():
        raise StoreError(f"{out}: already exists; unpack into a new directory")
    tmp = out.with_name(f".{out.name}.{os.getpid()}.partial")
    with zipfile.ZipFile(pack) as archive:
        manifest = _manifest(archive, pack)
        names = [n for n in archive.namelist() if not n.endswith("/")]
        bad = [n for n in names if not _safe(n)]
        if bad:
            raise VerificationError(f"{pack}: unsafe member name {bad[0]!r}; not unpacking")
        members = manifest.get("members", {})
        extra = sorted(set(names) - set(members) - {MANIFEST})
        if extra:
            raise VerificationError(f"{pack}: member {extra[0]} is not in the manifest")
        try:
            for name in sorted(members):
                data = archive.read(name) if name in names else None
                if data is None or _sha(data) != members[name].get("sha256"):
                    state = "missing" if data is None else "differs from the manifest"
                    raise VerificationError(f"{pack}: member {name} {state}; not unpacking")
                dest = tmp / name
                dest.parent.mkdir(parents=True, exist_ok=True)
                dest.write_bytes(data)
            (tmp / MANIFEST).write_bytes(archive.read(MANIFEST))
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
    os.replace(tmp, out)
    return out
