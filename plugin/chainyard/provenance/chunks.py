"""Chunk-level checks (stored bytes and decoded rows) and the chain to a store's inputs."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from chainyard.errors import StoreError
from chainyard.provenance.checks import Finding, steps_label
from chainyard.store import Store, chunk_checksum
from chainyard.store.files import iter_stored, read_stored, stored_size
from chainyard.store.integrity import INTEGRITY_KEY, bytes_checksum
from chainyard.store.packed import UnsafeMemberError, declared_chunk_bytes, most_chunk_file_bytes

__all__ = ["check_chain", "check_chunks", "check_input", "check_start", "is_file_reference"]

_UNKNOWN = object()


def _decode_error(exc: Exception) -> str:
    text = " ".join(str(exc).split())
    text = text if len(text) <= 90 else text[:87] + "..."
    return f"corrupt chunk: cannot decode ({type(exc).__name__}: {text})"


def _judge(
    data: bytes | None, want_file: Any, rows_ok: bool | None, error: str | None, partial: bool
) -> tuple[str, str] | None:
    """(level, message) for one chunk, or None when it is intact."""
    if data is None and want_file is not None:
        return "problem", "chunk file missing"
    if error is not None:
        return "problem", error
    file_ok = want_file is _UNKNOWN or (
        bytes_checksum(data) == want_file if data is not None else want_file is None
    )
    if rows_ok and file_ok:
        return None
    if not rows_ok and not file_ok:
        return (
            "problem",
            "checksum mismatch (stored bytes and decoded values differ from the commit)",
        )
    if not rows_ok:
        return "problem", "checksum mismatch of the decoded values (stored bytes match: metadata?)"
    if partial:
        return "note", (
            "stored bytes differ but the committed rows are intact (rows past the commit, "
            "e.g. from an interrupted run)"
        )
    return "problem", "checksum mismatch of the stored bytes (decoded values still match)"


def _chunk_file_bound(store: Store, array: str) -> tuple[int, Finding | None]:
    """Largest acceptable chunk file of ``array`` (e.g. ``draws/position``), after checking
    its declared chunk against the ``chunk_bytes`` limit; or a problem finding."""
    key = f"{array}/zarr.json"
    try:
        raw = read_stored(store, key, "metadata_bytes")
        if raw is None:
            return 0, Finding("problem", array, f"{key} missing")
        meta = json.loads(raw)
        if not isinstance(meta, dict):
            raise ValueError("not a JSON object")
        return most_chunk_file_bytes(declared_chunk_bytes(meta, f"{store.path}: {key}")), None
    except ValueError as exc:
        return 0, Finding("problem", array, f"{key}: {exc}")


def _read_chunk_file(store: Store, key: str) -> bytes | None:
    """A chunk file's bytes (size already checked), None if missing or unreadable."""
    try:
        if stored_size(store, key) is None:
            return None
        return b"".join(iter_stored(store, key))
    except (UnsafeMemberError, OSError):
        return None


def check_chunks(store: Store) -> tuple[list[Finding], int]:
    """Every committed chunk of every per-step array; returns the findings and chunks read."""
    record = store.commit_record
    n, size = store.steps_done, store.chunk_steps
    sums = record.get("checksums") or {}
    files = (record.get(INTEGRITY_KEY) or {}).get("files")
    out: list[Finding] = []
    count = 0
    for name in store.array_names():
        most, problem = _chunk_file_bound(store, f"draws/{name}")
        if problem is not None:
            out.append(problem)
            continue
        for i in range(-(-n // size)):
            lo, hi = i * size, min((i + 1) * size, n)
            want_rows = (sums.get(name) or [None] * (i + 1))[i:][:1]
            want_file: Any = _UNKNOWN
            if files is not None:
                column = files.get(name) or []
                want_file = column[i] if i < len(column) else "absent"
            key = store.chunk_key(name, i)
            stored = stored_size(store, key)
            if stored is not None and stored > most:
                where = f"draws/{name} chunk {i} ({steps_label(lo, hi)})"
                message = f"chunk file is {stored:,} bytes, more than a chunk can hold ({most:,})"
                out.append(Finding("problem", where, message))
                count += 1
                continue
            data = _read_chunk_file(store, key)
            error, rows_ok = None, None
            try:
                rows = store.read_rows(name, lo, hi, checked=False)
                rows_ok = bool(want_rows) and chunk_checksum(rows) == want_rows[0]
            except Exception as exc:  # any codec failure is a corrupt chunk, not a crash
                error = _decode_error(exc)
            count += 1
            verdict = _judge(data, want_file, rows_ok, error, partial=hi % size != 0)
            if verdict is not None:
                where = f"draws/{name} chunk {i} ({steps_label(lo, hi)})"
                out.append(Finding(verdict[0], where, verdict[1]))
    if not [f for f in out if f.level == "problem"]:
        what = "decoded rows and stored bytes" if files is not None else "decoded rows"
        out.append(Finding("ok", "chunks", f"{count} chunk(s): {what} match the commit"))
    return out, count


def check_start(store: Store) -> list[Finding]:
    """The start-state arrays against the checksums recorded when the store was created."""
    start = (store.commit_record.get(INTEGRITY_KEY) or {}).get("start")
    if not start:
        return []
    out: list[Finding] = []
    for name in store.start_names():
        where = f"start/{name} chunk 0 (state before step 0)"
        want = start.get(name)
        if want is None:
            out.append(Finding("problem", where, "no checksum recorded"))
            continue
        most, problem = _chunk_file_bound(store, f"start/{name}")
        if problem is not None:
            out.append(problem)
            continue
        key = store.start_chunk_key(name)
        stored = stored_size(store, key)
        if stored is not None and stored > most:
            message = f"chunk file is {stored:,} bytes, more than a chunk can hold ({most:,})"
            out.append(Finding("problem", where, message))
            continue
        data = _read_chunk_file(store, key)
        error, rows_ok = None, None
        try:
            rows_ok = chunk_checksum(store.start_array(name, checked=False)) == want.get("rows")
        except Exception as exc:
            error = _decode_error(exc)
        verdict = _judge(data, want.get("file"), rows_ok, error, partial=False)
        if verdict is not None:
            out.append(Finding(verdict[0], where, verdict[1]))
    if not out:
        out.append(Finding("ok", "start", "start-state arrays match the commit"))
    return out


def is_file_reference(path: str) -> bool:
    """Whether a model or loader reference names a file (else an importable module).

    The same rule as :func:`chainyard.model.resolve_source`: ``*.py`` or a path with a slash.
    """
    return path.endswith(".py") or "/" in path or "\\" in path


def check_input(ref: dict[str, Any], what: str, near: Path | None = None) -> Finding:
    """Whether the store or file named by ``ref`` (path + sha256) still has that content.

    A relative path is looked up as :func:`~chainyard.provenance.record.input_candidates`
    does; any candidate with the recorded content passes.
    """
    from chainyard.provenance.record import file_digest, input_candidates, store_digest

    where = f"{what} {ref.get('path')}"
    candidates = input_candidates(str(ref.get("path")), near)
    if not candidates:
        return Finding("note", where, "not found here: the chain is checked up to this point")
    digest = ""
    for path in candidates:
        try:
            if ref.get("kind") == "store" or path.is_dir():
                source = Store.open(path)
                digest = store_digest(source)
                source.close()
            else:
                digest = file_digest(path)
        except (StoreError, OSError) as exc:
            return Finding("problem", where, f"cannot be read ({exc})")
        if digest == ref.get("sha256"):
            return Finding("ok", where, "matches its recorded content hash")
    return Finding(
        "problem",
        where,
        f"changed since it was used (sha256 recorded {str(ref.get('sha256'))[:12]}, "
        f"now {digest[:12]})",
    )


def check_chain(store: Store) -> list[Finding]:
    """Derived stores: the source store and decision records, where they are found.

    A missing input is a note (a shared store travels without them); an input that exists
    with other content is a problem. Sampled stores: notes on model and data files that no
    longer match the hashes recorded at sampling.
    """
    attrs = store.attrs
    derived = attrs.get("derived")
    out: list[Finding] = []
    if derived:
        from chainyard.provenance.record import open_matching

        source = derived.get("source") or {}
        out.append(check_input({**source, "kind": "store"}, "source store", store.path))
        parent = open_matching(source, store.path) if out[-1].level == "ok" else None
        if parent is not None:
            if parent.attrs.get("derived") != derived.get("parent"):
                out.append(
                    Finding(
                        "problem",
                        f"source store {source['path']}",
                        "its derivation record differs from this store's copy",
                    )
                )
            if parent.attrs.get("config_hash") != attrs.get("config_hash"):
                out.append(
                    Finding(
                        "problem",
                        f"source store {source['path']}",
                        "its config differs from this store's copy",
                    )
                )
            parent.close()
        for ref in derived.get("records") or []:
            out.append(check_input(ref, "decision record", store.path))
        return out
    base = Path(str(attrs.get("config_dir", ".")))
    ident = attrs.get("identity") or {}
    refs = [(k, ident.get(k)) for k in ("model_source", "data", "data_loader", "initial_positions")]
    for key, ref in [*refs, *(("extra", r) for r in ident.get("extra_sources") or [])]:
        code = key in ("model_source", "data_loader")
        if not ref or (code and not is_file_reference(str(ref.get("path", "")))):
            continue
        path = Path(str(ref["path"]))
        path = path if path.is_absolute() else base / path
        finding = check_input({"path": str(path), "sha256": ref.get("sha256")}, "input", None)
        if finding.level == "problem":
            finding = Finding(
                "note",
                finding.where,
                finding.message + "; the store is "
                "unaffected, but a replay needs the recorded content",
            )
        if finding.level != "ok":
            out.append(finding)
    return out
