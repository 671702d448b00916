"""Stores and packs in S3-compatible object storage (``s3://bucket/path.zarr``).

Reading: a store (or pack) in a bucket is copied object by object into a private local
folder, then opened and checked exactly as a local one; the copy is deleted when the process
ends. The copy is bounded as a pack is (``pack_members``, ``pack_member_bytes``,
``pack_total_bytes`` in :mod:`chainyard.limits`, checked from the listing before anything is
downloaded), objects are streamed to disk (bounded memory), and every object's key must lie
under the store's prefix with plain path parts (no ``..``, no absolute parts), so nothing is
written outside the copy. Writing: :func:`upload_tree` copies a finished local store's files
(or a pack) to a bucket; ``chainyard publish`` then reads it back and verifies it there.
Sampling never writes to a bucket (its commit protocol relies on atomic renames and a file
lock, which object storage does not offer).

Credentials and the endpoint come from the usual places (``AWS_ACCESS_KEY_ID``,
``AWS_SECRET_ACCESS_KEY``, ``AWS_ENDPOINT_URL``, ``~/.aws``) through s3fs; they are never
written into a record, a log or a stamp. Needs ``pip install 'chainyard[s3]'``.
"""

from __future__ import annotations

import atexit
import os
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path, PurePosixPath
from typing import Any

from chainyard import limits
from chainyard.errors import StorageFaultError, StoreError

__all__ = ["is_remote", "local_copy", "normalise", "remote_keys", "upload_tree"]

SCHEME = "s3://"

#: URL -> local copy, made once per process
_COPIES: dict[str, Path] = {}
_ROOT: Path | None = None


def is_remote(path: object) -> bool:
    """Whether ``path`` names an object-storage location (``s3://``; also ``s3:/`` as a
    path object spells it)."""
    return str(path).startswith("s3:/")


def normalise(path: object) -> str:
    """``s3://bucket/key`` without a trailing slash (``Path("s3://b/k")`` reads ``s3:/b/k``)."""
    text = str(path)
    rest = text[len("s3:") :].lstrip("/").rstrip("/")
    if "/" not in rest or not rest.split("/", 1)[1]:
        raise StoreError(
            f"{text}: an object-storage store is s3://BUCKET/PATH (e.g. s3://results/kiln.zarr)"
        )
    return SCHEME + rest


def _filesystem() -> Any:
    try:
        import s3fs
    except ImportError:
        raise StoreError(
            "reading or writing s3:// needs the s3fs package: pip install 'chainyard[s3]'"
        ) from None
    endpoint = os.environ.get("AWS_ENDPOINT_URL")
    kwargs: dict[str, Any] = {"client_kwargs": {"endpoint_url": endpoint}} if endpoint else {}
    return s3fs.S3FileSystem(use_listings_cache=False, **kwargs)


def _fault(url: str, exc: BaseException) -> StoreError:
    """One line for a failure of the object store (no credentials, no bucket, refused)."""
    name = type(exc).__name__
    text = str(exc).splitlines()[0][:160] if str(exc) else ""
    if "credential" in (name + text).lower():
        return StoreError(
            f"{url}: no credentials for the object store (set AWS_ACCESS_KEY_ID and "
            "AWS_SECRET_ACCESS_KEY, or configure ~/.aws)"
        )
    if "NoSuchBucket" in name + text or "bucket does not exist" in text.lower():
        return StoreError(f"{url}: the bucket does not exist")
    return StoreError(f"{url}: object store: {name}: {text}" if text else f"{url}: {name}")


def _plain_parts(relative: str) -> bool:
    parts = PurePosixPath(relative).parts
    return (
        bool(parts)
        and not relative.startswith("/")
        and all(p not in ("", ".", "..") and "\\" not in p for p in parts)
    )


def remote_keys(url: str) -> dict[str, int]:
    """Relative key -> size of every object under ``url`` (one object: ``{"": size}``).

    Raises
    ------
    StoreError
        If nothing is there, the listing breaks a limit, a key has unsafe parts, or the
        object store refuses (one line).
    """
    fs = _filesystem()
    prefix = url[len(SCHEME) :]
    try:
        listing: dict[str, Any] = fs.find(prefix, detail=True, withdirs=False)
    except Exception as exc:
        raise _fault(url, exc) from None
    out: dict[str, int] = {}
    for key, info in listing.items():
        key = key.rstrip("/")
        relative = "" if key == prefix else key[len(prefix) + 1 :]
        if relative and (not key.startswith(prefix + "/") or not _plain_parts(relative)):
            raise StoreError(f"{url}: object {key!r} is not a plain path under the store")
        size = int(info.get("size") or 0)
        limits.check("pack_member_bytes", size, f"{url}/{relative}")
        out[relative] = size
    if not out:
        raise StoreError(f"{url}: store not found (no objects under it)")
    limits.check("pack_members", len(out), url)
    limits.check("pack_total_bytes", sum(out.values()), url)
    return out


def _copy_root() -> Path:
    global _ROOT
    if _ROOT is None:
        _ROOT = Path(tempfile.mkdtemp(prefix="chainyard-s3-"))
        atexit.register(shutil.rmtree, _ROOT, True)
    return _ROOT


def local_copy(path: object) -> Path:
    """A private local copy of the store or pack at ``path`` (``s3://...``), made once.

    The copy sits at ``TMP/chainyard-s3-XXXX/BUCKET/PATH`` (so messages name the bucket and
    path) and is removed when the process ends.
    """
    url = normalise(path)
    if url in _COPIES:
        return _COPIES[url]
    keys = remote_keys(url)
    target = _copy_root().joinpath(*url[len(SCHEME) :].split("/"))
    if target.exists():
        shutil.rmtree(target)
    fs = _filesystem()
    try:
        if list(keys) == [""]:  # one object: a pack
            target.parent.mkdir(parents=True, exist_ok=True)
            fs.get_file(url[len(SCHEME) :], str(target))
        else:
            for relative in sorted(keys):
                local = target.joinpath(*PurePosixPath(relative).parts)
                local.parent.mkdir(parents=True, exist_ok=True)
                fs.get_file(f"{url[len(SCHEME) :]}/{relative}", str(local))
    except OSError as exc:
        if isinstance(exc, FileNotFoundError):
            raise _fault(url, exc) from None
        raise StorageFaultError(f"{target}: copying {url} failed: {exc}") from None
    except Exception as exc:
        raise _fault(url, exc) from None
    _COPIES[url] = target
    return target


def _files(local: Path) -> Iterator[tuple[Path, str]]:
    """(file, key relative to ``local``) of every regular file of a store folder."""
    for path in sorted(local.rglob("*")):
        if path.is_symlink():
            raise StoreError(f"{path}: a symbolic link inside the store; not published")
        if path.is_file():
            yield path, path.relative_to(local).as_posix()


def upload_tree(local: Path, url: str, skip: frozenset[str] = frozenset()) -> tuple[int, int]:
    """Copy a store folder's files (or one pack file) to ``url``; (files, bytes) copied.

    Refuses a destination that already holds objects (exit 5 through StoreError's caller).
    """
    from chainyard.errors import StoreConflictError

    url = normalise(url)
    fs = _filesystem()
    prefix = url[len(SCHEME) :]
    try:
        held = fs.find(prefix, withdirs=False)
    except Exception as exc:
        raise _fault(url, exc) from None
    if held:
        raise StoreConflictError(
            f"{url}: already holds {len(held)} object(s); publish to a new path (or delete "
            "them first)"
        )
    bucket = prefix.split("/", 1)[0]
    try:
        if not fs.exists(bucket):
            raise StoreError(f"{url}: the bucket does not exist")
        files = [(local, "")] if local.is_file() else list(_files(local))
        total = 0
        for path, key in files:
            if key in skip:
                continue
            fs.put_file(str(path), f"{prefix}/{key}" if key else prefix)
            total += path.stat().st_size
    except StoreError:
        raise
    except Exception as exc:
        raise _fault(url, exc) from None
    return len([f for f in files if f[1] not in skip]), total
