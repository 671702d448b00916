"""``chainyard publish``: copy a finished store or a pack to object storage, verified there.

The local store must pass ``chainyard verify`` first (a damaged store is not published).
Its files are uploaded under ``s3://BUCKET/PATH`` (a destination that already holds objects
is refused, exit 5); then the objects are read back into a private local copy, compared
byte for byte with the local files, and the copy is verified again (seal, checksums,
counters). Only then does publish report success, so a run sampled on a cluster's scratch
disk ends up in the bucket intact.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

from chainyard.errors import StoreError, VerificationError
from chainyard.provenance.verify import verify
from chainyard.store.remote import local_copy, normalise, upload_tree

__all__ = ["publish"]


def _digest(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _tree(root: Path) -> dict[str, Path]:
    if root.is_file():
        return {"": root}
    return {p.relative_to(root).as_posix(): p for p in sorted(root.rglob("*")) if p.is_file()}


def publish(source: str | Path, url: str) -> str:
    """Upload ``source`` (a local store folder or pack) to ``url`` and verify it there.

    Returns
    -------
    str
        The one-line summary (files, megabytes, where).

    Raises
    ------
    VerificationError
        If the local store does not verify, or the copy read back differs or does not
        verify (exit 7).
    StoreError
        If the source is missing, the destination is taken (exit 5) or the object store
        refuses (one line).
    """
    local = Path(source)
    url = normalise(url)
    if not local.exists():
        raise StoreError(f"{local}: store not found")
    report = verify(local)
    if not report.ok:
        raise VerificationError(
            f"{local}: does not verify; not published (`chainyard verify {local}` names the "
            "problem)"
        )
    files, nbytes = upload_tree(local, url)
    copy = local_copy(url)
    here, there = _tree(local), _tree(copy)
    if sorted(here) != sorted(there):
        missing = sorted(set(here) ^ set(there))
        raise VerificationError(
            f"{url}: the objects read back differ from {local} ({missing[0]!r})"
        )
    for key, path in here.items():
        if _digest(path) != _digest(there[key]):
            raise VerificationError(f"{url}/{key}: the object read back differs from {path}")
    again = verify(copy, chain=False)
    if not again.ok:
        raise VerificationError(f"{url}: the published copy does not verify")
    return f"published {files} files ({nbytes / 1e6:.2f} MB) to {url}; read back and verified there"
