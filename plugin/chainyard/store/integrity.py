"""The integrity block of a commit record: stored-byte checksums and the metadata seal.

Every commit record (``commit.json``) carries, besides the per-chunk checksums of the decoded
rows (``checksums``, written by the engine), a block ``integrity`` maintained by
:meth:`chainyard.store.Store.commit` (format version 1)::

    "integrity": {
      "format_version": 1,
      "files":  {ARRAY: [CHUNK_FILE_SUM or null, ...]},   # per committed chunk of draws/ARRAY
      "start":  {NAME: {"rows": ROWS_SUM, "file": FILE_SUM or null}},   # start/NAME
      "arrays": {NODE: SHA256},        # zarr.json of every array, without "shape"
      "attrs":  {KEY: SHA256},         # every key of zarr.json attributes.chainyard
      "record": {KEY: SHA256},         # every other key of this commit record
      "segment_states": [RNG_STATE or null, ...],   # sampler RNG state at each segment's start
      "self":   SHA256                 # of this block without "self"
    }

``FILE_SUM`` is BLAKE2b-128 (hex) of the chunk's stored (encoded) bytes, so a flipped byte
is found even where the codec would decode it to the same values; ``null`` means no chunk
file was written because every value equals the fill value (zarr omits such chunks).
``ROWS_SUM`` is :func:`chunk_checksum` of the decoded values. ``SHA256`` is the SHA-256 of
the canonical JSON (sorted keys, no spaces) of the value. Hashing each key separately lets a
verifier name exactly what was edited. The seal detects accidental and naive edits; it is
not a signature (anyone able to rewrite the files can rewrite the seal).
"""

from __future__ import annotations

import hashlib
import json
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from chainyard.store.layout import INTEGRITY_KEY, chunk_key_from_metadata
from chainyard.store.presence import check_present

if TYPE_CHECKING:  # pragma: no cover
    from chainyard.errors import StoreError
    from chainyard.store.zarr_store import Store

__all__ = [
    "INTEGRITY_KEY",
    "INTEGRITY_VERSION",
    "array_metadata",
    "bytes_checksum",
    "canonical_sha256",
    "check_resume_base",
    "check_seal",
    "chunk_checksum",
    "chunk_key_from_metadata",
    "keyed_hashes",
    "metadata_without_shape",
    "seal_record",
    "self_hash",
]

INTEGRITY_VERSION = 1


def canonical_sha256(value: Any) -> str:
    """SHA-256 (hex) of the canonical JSON of ``value`` (sorted keys, no spaces)."""
    text = json.dumps(value, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(text.encode()).hexdigest()


def chunk_checksum(rows: NDArray[Any]) -> str:
    """BLAKE2b-128 (hex) of an array's C-order bytes, prefixed by its shape and dtype."""
    h = hashlib.blake2b(digest_size=16)
    h.update(f"{rows.dtype.str}{rows.shape}".encode())
    # hashed from the array's buffer: no copy, and hashlib releases the GIL while it reads
    h.update(memoryview(np.ascontiguousarray(rows)).cast("B"))
    return h.hexdigest()


def bytes_checksum(data: bytes) -> str:
    """BLAKE2b-128 (hex) of stored bytes."""
    return hashlib.blake2b(data, digest_size=16).hexdigest()


def keyed_hashes(mapping: dict[str, Any], exclude: tuple[str, ...] = ()) -> dict[str, str]:
    """``{key: canonical_sha256(value)}`` for every key not in ``exclude``."""
    return {k: canonical_sha256(v) for k, v in mapping.items() if k not in exclude}


def metadata_without_shape(meta: dict[str, Any]) -> dict[str, Any]:
    """An array's zarr.json without ``shape`` (which grows when a run is extended)."""
    return {k: v for k, v in meta.items() if k != "shape"}


def self_hash(block: dict[str, Any]) -> str:
    """The ``self`` entry of an integrity block: SHA-256 of the block without it."""
    return canonical_sha256({k: v for k, v in block.items() if k != "self"})


def array_metadata(store: Store) -> dict[str, Any]:
    """Parsed zarr.json of every array of ``store`` by node name (None where it is missing)."""
    from chainyard.store.layout import BLOB, DRAWS, LOG_PROB, POSITION, START

    names = [f"{DRAWS}/{n}" for n in store.array_names()]
    names += [f"{START}/{n}" for n in (POSITION, LOG_PROB)]
    names += [f"{START}/{BLOB}/{b}" for b in store.blob_names]
    out: dict[str, Any] = {}
    for node in names:
        raw = store.read_bytes(f"{node}/zarr.json")
        out[node] = None if raw is None else json.loads(raw)
    return out


def _file_sum(store: Store, key: str) -> str | None:
    data = store.read_bytes(key)
    return None if data is None else bytes_checksum(data)


def _segment_states(
    previous: dict[str, Any], prev_block: dict[str, Any], segments: list[dict[str, Any]]
) -> list[Any]:
    """Carry the known segment start states forward and add those of new segments.

    A segment that begins at the previous commit's ``steps_done`` started from that commit's
    RNG state (the run loop resumes from exactly that record).
    """
    states = list(prev_block.get("segment_states", []))[: len(segments)]
    while len(states) < len(segments):
        seg = segments[len(states)]
        starts_here = previous and seg.get("from_step") == previous.get("steps_done")
        states.append(previous.get("random_state") if starts_here else None)
    return states


def seal_record(
    store: Store,
    record: dict[str, Any],
    previous: dict[str, Any],
    *,
    written: set[int] | frozenset[int] = frozenset(),
    file_sums: dict[str, dict[int, str]] | None = None,
) -> dict[str, Any]:
    """``record`` with a fresh integrity block, given the store's previous commit record.

    Chunk files are re-read for the chunks written since the previous commit (``written``)
    and from the chunk holding the previous ``steps_done`` on, except those whose stored-byte
    checksum the writer already knows (``file_sums[array][chunk]``); others keep their sums.
    """
    known = file_sums or {}
    body = {k: v for k, v in record.items() if k != INTEGRITY_KEY}
    prev_block = previous.get(INTEGRITY_KEY) or {}
    n = int(body["steps_done"])
    meta = array_metadata(store)  # read once; chunk keys come from it (no zarr lookups)
    grid = meta["draws/position"]["chunk_grid"]["configuration"]["chunk_shape"]
    size = int(grid[0])
    n_chunks = -(-n // size)
    prev_steps = int(previous.get("steps_done", 0)) if prev_block else 0
    first_touched = (prev_steps // size) if n > prev_steps else n_chunks
    files: dict[str, list[str | None]] = {}
    for name in store.array_names():
        old = list(prev_block.get("files", {}).get(name, []))
        sums = old[: min(first_touched, n_chunks)]
        node = f"draws/{name}"
        have = known.get(name, {})

        def file_sum(i: int, node: str = node, have: dict[int, str] = have) -> str | None:
            if i in have:
                return have[i]
            return _file_sum(store, chunk_key_from_metadata(node, meta[node], i))

        for i in range(len(sums), n_chunks):
            sums.append(file_sum(i))
        for i in sorted(c for c in written if c < len(sums)):
            sums[i] = file_sum(i)
        files[name] = sums
    start = prev_block.get("start")
    if not start:
        start = {}
        for name in store.start_names():
            start[name] = {
                "rows": chunk_checksum(store.start_array(name, checked=False)),
                "file": _file_sum(
                    store, chunk_key_from_metadata(f"start/{name}", meta[f"start/{name}"], 0)
                ),
            }
    block: dict[str, Any] = {
        "format_version": INTEGRITY_VERSION,
        "files": files,
        "start": start,
        "arrays": {
            node: canonical_sha256(metadata_without_shape(m))
            for node, m in meta.items()
            if m is not None
        },
        "attrs": keyed_hashes(store.attrs),
        "record": keyed_hashes(body),
        "segment_states": _segment_states(previous, prev_block, list(body.get("segments", []))),
    }
    block["self"] = self_hash(block)
    return {**body, INTEGRITY_KEY: block}


#: attributes an extension rewrites (``Store.update_attrs``) just before it re-seals: a kill
#: between the two leaves them ahead of the seal, which the next resume re-seals anyway
_REFRESHED_ATTRS = ("config", "config_hash")


_RESUME_HINT = "the store is damaged; `chainyard verify` names every problem; --restart discards it"


def _damaged(store: Store, what: str, hint: str = _RESUME_HINT) -> StoreError:
    from chainyard.errors import StoreError

    return StoreError(f"{store.path}: {what}: {hint}")


def _steps(lo: int, hi: int) -> str:
    return f"step {lo}" if hi - lo == 1 else f"steps {lo}-{hi - 1}"


def check_seal(store: Store, hint: str = _RESUME_HINT) -> None:
    """The seal of ``store``'s commit record (metadata only; see :func:`_check_seal`).

    Raises
    ------
    StoreError
        Naming the first edited key, file or attribute (exit 4); ``hint`` ends the line.
    """
    record = store._commit
    block = record.get(INTEGRITY_KEY)
    if not isinstance(block, dict):
        raise _damaged(store, "commit.json has no integrity block (nothing to check it by)", hint)
    _check_seal(store, record, block, hint)


def _check_seal(
    store: Store, record: dict[str, Any], block: dict[str, Any], hint: str = _RESUME_HINT
) -> None:
    """The commit record, attributes and array metadata against the seal (metadata only)."""
    if block.get("format_version") != INTEGRITY_VERSION:
        raise _damaged(store, f"commit.json integrity format {block.get('format_version')!r}", hint)
    if self_hash(block) != block.get("self"):
        raise _damaged(store, "commit.json integrity block was edited (its SHA-256 differs)", hint)
    body = {k: v for k, v in record.items() if k != INTEGRITY_KEY}
    sealed = block.get("record")
    current = keyed_hashes(body)
    if not isinstance(sealed, dict):
        raise _damaged(store, "commit.json integrity block has no 'record' hashes", hint)
    for key in sorted(set(sealed) | set(current)):
        if sealed.get(key) != current.get(key):
            raise _damaged(store, f"commit.json field '{key}' differs from the commit's seal", hint)
    attrs = store.attrs
    sealed = block.get("attrs")
    if not isinstance(sealed, dict):
        raise _damaged(store, "commit.json integrity block has no 'attrs' hashes", hint)
    current = keyed_hashes(attrs)
    refreshed = canonical_sha256(attrs.get("config")) == attrs.get("config_hash")
    for key in sorted(set(sealed) | set(current)):
        if sealed.get(key) != current.get(key) and not (refreshed and key in _REFRESHED_ATTRS):
            raise _damaged(
                store, f"zarr.json attribute chainyard '{key}' differs from the commit's seal", hint
            )
    sealed = block.get("arrays")
    if not isinstance(sealed, dict):
        raise _damaged(store, "commit.json integrity block has no 'arrays' hashes", hint)
    for node, meta in array_metadata(store).items():
        if meta is None:
            raise _damaged(store, f"{node}/zarr.json is missing", hint)
        if sealed.get(node) != canonical_sha256(metadata_without_shape(meta)):
            raise _damaged(store, f"{node}/zarr.json differs from the commit's seal", hint)


def _check_last_chunk(store: Store, name: str, block: dict[str, Any]) -> None:
    """The chunk of ``draws/<name>`` holding the last committed row, against the record."""
    n, size = store.steps_done, store.chunk_steps
    i = (n - 1) // size
    lo, hi = i * size, n
    where = f"draws/{name} chunk {i} ({_steps(lo, min((i + 1) * size, n))})"
    column = (block.get("files") or {}).get(name)
    if not isinstance(column, list) or len(column) <= i:
        raise _damaged(store, f"commit.json records no checksum for {where}")
    want = column[i]
    data = store.read_bytes(store.chunk_key(name, i))
    if data is None:
        if want is None:
            return  # every value equals the fill value: zarr wrote no file
        raise _damaged(store, f"{where} is missing")
    if want is not None and bytes_checksum(data) == want:
        return
    # a partial last chunk may hold rows past the commit from an interrupted run: compare the
    # decoded committed rows with the record's checksum instead
    rows_sum = ((store.commit_record.get("checksums") or {}).get(name) or [None] * (i + 1))[i:]
    if hi % size and rows_sum:
        try:
            rows = store.read_rows(name, lo, hi, checked=False)
        except MemoryError:
            raise
        except Exception:  # any decode failure of an untrusted chunk means it is damaged
            raise _damaged(store, f"{where} cannot be decoded") from None
        if chunk_checksum(rows) == rows_sum[0]:
            return
    raise _damaged(store, f"{where} does not match its recorded checksum")


def _check_start(store: Store, block: dict[str, Any]) -> None:
    """Every start-state array exists and its chunk matches the recorded checksum."""
    start = block.get("start")
    if not isinstance(start, dict):
        raise _damaged(store, "commit.json integrity block records no start-state checksums")
    for name in store.start_names():
        where = f"start/{name}"
        want = start.get(name)
        if not isinstance(want, dict):
            raise _damaged(store, f"commit.json records no checksum for {where}")
        data = store.read_bytes(store.start_chunk_key(name))
        if data is None:
            if want.get("file") is None:
                continue
            raise _damaged(store, f"{where} chunk 0 (state before step 0) is missing")
        if bytes_checksum(data) != want.get("file"):
            raise _damaged(
                store, f"{where} chunk 0 (state before step 0) does not match its checksum"
            )


def check_resume_base(store: Store) -> None:
    """Check what a resume or extension of ``store`` builds on; raise if it is damaged.

    Checked: the commit record's integrity block against itself, the commit record, the
    ``zarr.json`` attributes and every array's metadata (the seal); the chunk of every
    per-step array holding the last committed row (stored bytes against the recorded
    checksum; for a partial chunk, the decoded committed rows when the bytes differ); that
    every other committed chunk file exists (one ``stat`` each); and the start-state arrays.
    Only the last chunk of each array is read, so the cost barely grows with the store's
    length; a changed byte in an earlier chunk is for ``chainyard verify`` to find.

    Raises
    ------
    StoreError
        Naming the first problem found (exit status 4).
    """
    record = store.commit_record
    block = record.get(INTEGRITY_KEY)
    if not isinstance(block, dict):
        raise _damaged(store, "commit.json has no integrity block")
    _check_seal(store, record, block)
    _check_start(store, block)
    if store.steps_done > 0:
        for name in store.array_names():
            # every committed chunk file exists (one stat each) ...
            check_present(store, f"draws/{name}", 0, store.steps_done)
            # ... and the last one, which the resume rewrites, holds the recorded bytes
            _check_last_chunk(store, name, block)
