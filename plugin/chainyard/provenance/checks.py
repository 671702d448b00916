"""Metadata checks of a store: the seal, the counters and the internal provenance chain.

Each check returns a list of :class:`Finding`. Nothing here decodes chunks (see
:mod:`chainyard.provenance.chunks`) or executes code: zarr metadata and JSON only.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from chainyard.store import Store
from chainyard.store.integrity import (
    INTEGRITY_KEY,
    INTEGRITY_VERSION,
    array_metadata,
    canonical_sha256,
    keyed_hashes,
    metadata_without_shape,
    self_hash,
)

__all__ = ["Finding", "check_consistency", "check_counters", "check_seal", "steps_label"]

SEGMENT_KINDS = ("start", "resume", "extend")


@dataclass(frozen=True)
class Finding:
    """One result of a verification.

    Attributes
    ----------
    level : {"ok", "problem", "note"}
        ``problem`` makes verification fail; ``note`` is information (e.g. an input that is
        not available here).
    where : str
        What was checked, e.g. ``"draws/position chunk 3 (steps 3000-3999)"``.
    message : str
        What holds or what is wrong.
    """

    level: str
    where: str
    message: str

    def __str__(self) -> str:
        return f"{self.where}: {self.message}"

    def to_dict(self) -> dict[str, str]:
        """JSON form."""
        return {"level": self.level, "where": self.where, "message": self.message}


def steps_label(lo: int, hi: int) -> str:
    """``"steps 3000-3999"`` for rows ``[lo, hi)`` (0-based, inclusive range shown)."""
    return f"step {lo}" if hi - lo == 1 else f"steps {lo}-{hi - 1}"


def _short(digest: Any) -> str:
    return str(digest)[:12] if digest else "none"


def _compare_keyed(
    where: str, what: str, recorded: dict[str, str], current: dict[str, str]
) -> list[Finding]:
    out = []
    for key in sorted(set(recorded) | set(current)):
        if key not in current:
            out.append(Finding("problem", where, f"{what} '{key}' was removed since the commit"))
        elif key not in recorded:
            out.append(Finding("problem", where, f"{what} '{key}' was added since the commit"))
        elif recorded[key] != current[key]:
            out.append(Finding("problem", where, f"{what} '{key}' was edited since the commit"))
    return out


def check_seal(store: Store) -> list[Finding]:
    """The commit record's integrity block against the current metadata."""
    record = store.commit_record
    block = record.get(INTEGRITY_KEY)
    if not isinstance(block, dict):
        return [
            Finding(
                "problem",
                "commit.json",
                "no integrity block (written by a chainyard without one, or removed): stored "
                "bytes and metadata cannot be checked; decoded rows still are",
            )
        ]
    out: list[Finding] = []
    if block.get("format_version") != INTEGRITY_VERSION:
        out.append(
            Finding(
                "problem",
                "commit.json",
                f"integrity format {block.get('format_version')}"
                f" is not supported (this chainyard reads {INTEGRITY_VERSION})",
            )
        )
        return out
    if self_hash(block) != block.get("self"):
        out.append(
            Finding(
                "problem", "commit.json", "the integrity block was edited (its SHA-256 differs)"
            )
        )
    body = {k: v for k, v in record.items() if k != INTEGRITY_KEY}
    out += _compare_keyed("commit.json", "field", block.get("record", {}), keyed_hashes(body))
    out += _compare_keyed(
        "zarr.json", "attribute chainyard", block.get("attrs", {}), keyed_hashes(store.attrs)
    )
    current = {
        node: canonical_sha256(metadata_without_shape(meta))
        for node, meta in array_metadata(store).items()
        if meta is not None
    }
    for node in sorted(set(block.get("arrays", {})) | set(current)):
        if node not in current:
            out.append(Finding("problem", f"{node}/zarr.json", "array metadata is missing"))
        elif block.get("arrays", {}).get(node) != current[node]:
            out.append(
                Finding(
                    "problem", f"{node}/zarr.json", "array metadata was edited since the commit"
                )
            )
    if not out:
        out.append(
            Finding(
                "ok",
                "seal",
                "zarr.json attributes, array metadata and commit.json match the commit's seal",
            )
        )
    return out


def _expect(out: list[Finding], where: str, what: str, got: Any, want: Any) -> None:
    if got != want:
        out.append(Finding("problem", where, f"{what} is {got!r}, expected {want!r}"))


def check_consistency(store: Store) -> list[Finding]:
    """Config hash, identity, streams and segment history agree with each other."""
    attrs, record = store.attrs, store.commit_record
    out: list[Finding] = []
    cfg = attrs.get("config") or {}
    ident = attrs.get("identity") or {}
    where = "zarr.json attributes"
    if canonical_sha256(cfg) != attrs.get("config_hash"):
        out.append(
            Finding(
                "problem",
                where,
                "config_hash does not match the stored config "
                f"(recorded {_short(attrs.get('config_hash'))}, "
                f"computed {_short(canonical_sha256(cfg))})",
            )
        )
    from chainyard.engine.drivers import stored_layout

    sampler = stored_layout(cfg.get("sampler") or {})
    replica = attrs.get("replica")
    _expect(out, where, "seed", attrs.get("seed"), cfg.get("seed"))
    _expect(out, where, "identity seed", ident.get("seed"), cfg.get("seed"))
    _expect(out, where, "identity replica", ident.get("replica"), replica)
    _expect(out, where, "walkers", attrs.get("walkers"), sampler.get("walkers"))
    _expect(out, where, "identity walkers", ident.get("walkers"), sampler.get("walkers"))
    _expect(out, where, "spawn_key", attrs.get("spawn_key"), [replica, 1])
    names = [p.get("name") for p in cfg.get("parameters") or []]
    _expect(out, where, "param_names", attrs.get("param_names"), names)
    _expect(out, where, "blob_names", attrs.get("blob_names"), sampler.get("blob_names"))
    _expect(out, where, "identity moves", ident.get("moves"), sampler.get("moves"))
    params = [
        {"name": p.get("name"), "init": p.get("init"), "bounds": p.get("bounds")}
        for p in cfg.get("parameters") or []
    ]
    _expect(out, where, "identity parameters", ident.get("parameters"), params)
    out += _check_history(store, attrs, record)
    if not out:
        out.append(
            Finding(
                "ok",
                "provenance",
                "config hash, identity, streams and segment history are consistent",
            )
        )
    return out


def _check_history(store: Store, attrs: dict[str, Any], record: dict[str, Any]) -> list[Finding]:
    out: list[Finding] = []
    segments = record.get("segments") or []
    n = store.steps_done
    derived = attrs.get("derived")
    if derived:
        d, s, f = (derived.get("source_steps") or [None, None, None])[:3]
        try:
            want = len(range(int(d), int(s), int(f)))
        except (TypeError, ValueError):
            return [Finding("problem", "zarr.json attributes", "derived.source_steps malformed")]
        _expect(out, "commit.json", "steps_done", n, want)
        _expect(out, "zarr.json attributes", "derived.discard", derived.get("discard"), d)
        _expect(out, "zarr.json attributes", "derived.factor", derived.get("factor"), f)
        return out
    where = "commit.json segments"
    if n > 0 and not segments:
        return [Finding("problem", where, f"{n} steps committed but no segment history")]
    prev_to = 0
    for k, seg in enumerate(segments):
        label = f"segment {k} ({seg.get('kind')})"
        if seg.get("kind") not in SEGMENT_KINDS or (seg.get("kind") == "start") != (k == 0):
            out.append(Finding("problem", where, f"{label}: unexpected kind"))
        a, b = seg.get("from_step"), seg.get("to_step")
        if not isinstance(a, int) or not isinstance(b, int) or a != prev_to or b < a:
            out.append(
                Finding(
                    "problem", where, f"{label}: steps {a}-{b} do not continue from step {prev_to}"
                )
            )
        ended = seg.get("ended_utc")
        if ended is not None and str(ended) < str(seg.get("started_utc")):
            out.append(Finding("problem", where, f"{label}: ends before it starts"))
        prev_to = b if isinstance(b, int) else prev_to
    if segments and prev_to != n:
        out.append(
            Finding("problem", where, f"history ends at step {prev_to} but steps_done is {n}")
        )
    if segments and segments[-1].get("config_hash") != attrs.get("config_hash"):
        out.append(
            Finding(
                "note",
                where,
                "the stored config was updated after the last commit "
                "(a continued run stopped before its first commit)",
            )
        )
    from chainyard.engine.drivers import check_random_state

    try:
        check_random_state(record.get("random_state"))
    except (ValueError, KeyError, TypeError) as exc:
        out.append(Finding("problem", "commit.json", f"random_state is malformed ({exc})"))
    return out


def check_counters(store: Store) -> list[Finding]:
    """steps_done, array shapes and chunking, and the number of recorded checksums."""
    record = store.commit_record
    out: list[Finding] = []
    n = record.get("steps_done")
    if not isinstance(n, int) or n < 0:
        return [Finding("problem", "commit.json", f"steps_done is {n!r}, not a count")]
    meta = array_metadata(store)
    walkers, n_params = store.walkers, len(store.param_names)
    chunks: set[int] = set()
    for name in store.array_names():
        node = f"draws/{name}"
        m = meta.get(node)
        if m is None:
            out.append(Finding("problem", node, "array is missing"))
            continue
        shape = m.get("shape", [])
        tail = [walkers, n_params] if name == "position" else [walkers]
        if list(shape[1:]) != tail:
            out.append(Finding("problem", node, f"shape {shape} does not fit {walkers} walkers"))
        if not shape or shape[0] < n:
            out.append(
                Finding("problem", node, f"holds {shape[:1]} rows, fewer than steps_done = {n}")
            )
        grid = (m.get("chunk_grid") or {}).get("configuration", {}).get("chunk_shape", [0])
        chunks.add(int(grid[0]))
    if len(chunks) > 1:
        out.append(Finding("problem", "draws", f"arrays differ in chunk length {sorted(chunks)}"))
    if out:
        return out
    n_chunks = -(-n // store.chunk_steps)
    sums = record.get("checksums") or {}
    files = (record.get(INTEGRITY_KEY) or {}).get("files")
    expected = set(store.array_names()) if n else set()
    if n and set(sums) != expected:
        out.append(
            Finding(
                "problem",
                "commit.json checksums",
                f"arrays {sorted(sums)} do not match the store's {sorted(expected)}",
            )
        )
    for name in store.array_names():
        if n and len(sums.get(name, [])) != n_chunks:
            out.append(
                Finding(
                    "problem",
                    f"commit.json checksums {name}",
                    f"{len(sums.get(name, []))} recorded, {n_chunks} chunks committed",
                )
            )
        if files is not None and len(files.get(name, [])) != n_chunks:
            out.append(
                Finding(
                    "problem",
                    f"commit.json integrity files {name}",
                    f"{len(files.get(name, []))} recorded, {n_chunks} chunks committed",
                )
            )
    for name, shape in (("position", [walkers, n_params]), ("log_prob", [walkers])):
        m = meta.get(f"start/{name}")
        if m is None or list(m.get("shape", [])) != shape:
            out.append(Finding("problem", f"start/{name}", "missing or of the wrong shape"))
    if not out:
        out.append(
            Finding(
                "ok",
                "counters",
                f"steps_done {n:,}; {n_chunks} chunk(s) of "
                f"{store.chunk_steps:,} steps in each of {len(store.array_names())} "
                "arrays",
            )
        )
    return out
