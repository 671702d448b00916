"""``chainyard verify``: is a store (or record) exactly what its commit says it is?

Verification reads stored bytes, zarr metadata and JSON, and decodes chunks with the codecs
named in the metadata; it never imports or executes anything from the store. It checks

* the **seal**: ``zarr.json`` attributes, every array's metadata and ``commit.json`` against
  the hashes the last commit recorded (names the edited key);
* the **counters**: ``steps_done``, array shapes and chunking, the number of checksums;
* the **provenance chain**: config hash, identity, streams and the segment history agree;
  a derived store's source store and decision records match their recorded content hashes
  (where they are found);
* every committed **chunk** of every array, and the start state: stored bytes (BLAKE2b of
  the chunk file) and decoded rows (BLAKE2b of the values), naming array, chunk and steps;
* the **files** inside the store (:mod:`chainyard.store.contents`): a file chainyard did not
  write, a symbolic link or a special file is a problem (each listed, up to
  :data:`MAX_LISTED`); leftover temporary files are a note.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from chainyard.errors import LimitExceededError, StoreError
from chainyard.provenance.checks import Finding, check_consistency, check_counters, check_seal
from chainyard.provenance.chunks import check_chain, check_chunks, check_input, check_start
from chainyard.provenance.pack_members import check_pack
from chainyard.store import Store
from chainyard.store.contents import scan_store
from chainyard.store.packed import UnsafeMemberError

__all__ = [
    "DAMAGE",
    "Finding",
    "VerifyReport",
    "check_files",
    "describe_damage",
    "verify",
    "verify_metadata",
]


@dataclass
class VerifyReport:
    """The findings of one verification.

    Attributes
    ----------
    subject : str
        What was verified (a path).
    kind : str
        ``"store"``, ``"derived_store"``, ``"packed_store"`` or ``"record"``.
    findings : list of Finding
        Every check, in order; ``problem`` entries make :attr:`ok` false.
    chunks : int
        Number of chunks decoded and compared.
    """

    subject: str
    kind: str
    findings: list[Finding] = field(default_factory=list)
    chunks: int = 0

    @property
    def problems(self) -> list[Finding]:
        """The findings that make verification fail."""
        return [f for f in self.findings if f.level == "problem"]

    @property
    def ok(self) -> bool:
        """True when nothing is wrong."""
        return not self.problems

    def lines(self) -> list[str]:
        """One line per finding (``ok``, ``PROBLEM`` or ``note``) and a closing verdict."""
        tag = {"ok": "ok     ", "problem": "PROBLEM", "note": "note   "}
        out = [f"{tag[f.level]} {f}" for f in self.findings]
        if self.ok:
            out.append(f"{self.subject}: verified ({self.kind}, {self.chunks} chunk(s) checked)")
        else:
            out.append(f"{self.subject}: {len(self.problems)} problem(s) found")
        return out

    def to_dict(self) -> dict[str, Any]:
        """JSON form (``chainyard verify --json``)."""
        return {
            "subject": self.subject,
            "kind": self.kind,
            "ok": self.ok,
            "chunks": self.chunks,
            "problems": [f.to_dict() for f in self.problems],
            "findings": [f.to_dict() for f in self.findings],
        }


def _kind(store: Store) -> str:
    if store.packed:
        return "packed_store"
    return "derived_store" if store.attrs.get("derived") else "store"


#: what damaged or crafted metadata raises inside a check (a value of the wrong type, a
#: missing key, an unparsable number); each becomes a problem finding, never a traceback
DAMAGE = (KeyError, TypeError, ValueError, AttributeError, IndexError)


def describe_damage(exc: BaseException) -> str:
    """One short line for an exception raised by damaged metadata."""
    if isinstance(exc, KeyError):
        return f"field {exc.args[0]!r} missing or of the wrong type" if exc.args else "key missing"
    text = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {text[:120]}"


def _guarded(where: str, check: Callable[[Store], list[Finding]], store: Store) -> list[Finding]:
    """The findings of ``check``, or one problem naming ``where`` if damaged metadata breaks it."""
    try:
        return check(store)
    except DAMAGE as exc:
        return [Finding("problem", where, f"malformed metadata ({describe_damage(exc)})")]


#: most files of one kind listed by name in a report (the rest are counted)
MAX_LISTED = 20


def _listed(level: str, names: list[str], message: str) -> list[Finding]:
    out = [Finding(level, name, message) for name in names[:MAX_LISTED]]
    if len(names) > MAX_LISTED:
        out.append(Finding(level, f"{len(names) - MAX_LISTED} more", message))
    return out


def check_files(store: Store) -> list[Finding]:
    """Files inside the store that chainyard did not write, links and special files."""
    found = scan_store(store)
    out = _listed(
        "problem",
        found.links,
        "symbolic link inside the store (chainyard writes none; pack refuses it)",
    )
    out += _listed("problem", found.special, "not a regular file (FIFO, device or socket)")
    out += _listed("problem", found.unknown, "unknown file: not written by chainyard")
    leftovers = [n for n in found.tolerated if not n.endswith("snakemake_timestamp")]
    out += _listed("note", leftovers, "temporary file left by an interrupted write (not packed)")
    if not [f for f in out if f.level == "problem"]:
        out.append(Finding("ok", "files", f"{len(found.known)} file(s), all written by chainyard"))
    return out


def _kind_of(store: Store) -> str:
    try:
        return _kind(store)
    except DAMAGE:
        return "store"


def verify_metadata(store: Store) -> VerifyReport:
    """The cheap checks only (seal, counters, consistency): no chunk is decoded."""
    report = VerifyReport(str(store.path), _kind_of(store))
    report.findings += _guarded("seal (commit.json, zarr.json)", check_seal, store)
    report.findings += _guarded("counters (commit.json, array metadata)", check_counters, store)
    report.findings += _guarded("provenance (zarr.json attributes)", check_consistency, store)
    return report


def verify_store(store: Store, *, chain: bool = True) -> VerifyReport:
    """Every check on one store (see the module docstring)."""
    report = VerifyReport(str(store.path), _kind_of(store))
    report.findings += _guarded("seal (commit.json, zarr.json)", check_seal, store)
    counters = _guarded("counters (commit.json, array metadata)", check_counters, store)
    report.findings += counters
    report.findings += _guarded("provenance (zarr.json attributes)", check_consistency, store)
    if not [f for f in counters if f.level == "problem"]:
        try:
            findings, report.chunks = check_chunks(store)
        except DAMAGE as exc:
            findings = [
                Finding("problem", "chunks", f"malformed metadata ({describe_damage(exc)})")
            ]
        report.findings += findings
    report.findings += _guarded("start (start-state arrays)", check_start, store)
    report.findings += _guarded("files (inside the store)", check_files, store)
    report.findings += _guarded("pack (pack/manifest.json)", check_pack, store)
    if chain:
        report.findings += _guarded("inputs (recorded sources)", check_chain, store)
    return report


def verify_record(path: Path) -> VerifyReport:
    """A JSON record, sidecar or plot: its inputs (and output) still match their hashes."""
    from chainyard.provenance.record import read_output_record

    report = VerifyReport(str(path), "record")
    rec = read_output_record(path)
    report.findings.append(
        Finding(
            "ok",
            "record",
            f"kind {rec.get('kind', 'png metadata')!r}, {len(rec['inputs'])} input(s)",
        )
    )
    if isinstance(rec.get("output"), dict):
        report.findings.append(check_input(rec["output"], "output", path))
    for ref in rec["inputs"]:
        report.findings.append(check_input(ref, f"input {ref.get('kind', 'file')}", path))
    return report


def verify(target: str | Path | Store, *, chain: bool = True) -> VerifyReport:
    """Verify a store (directory or packed zip) or a JSON record.

    Parameters
    ----------
    target : str, Path or Store
        What to verify.
    chain : bool
        Also check the inputs a derived store or record names (where they are found).

    Returns
    -------
    VerifyReport
        ``report.ok`` is true only when every check holds.

    Raises
    ------
    StoreError
        If the target is missing or cannot be opened as a store or record at all.
    """
    if isinstance(target, Store):
        return verify_store(target, chain=chain)
    path = Path(target)
    if path.is_file() and path.suffix.lower() in (".json", ".png"):
        return verify_record(path)
    try:
        store = Store.open(path)
    except UnsafeMemberError as exc:
        report = VerifyReport(str(path), "packed_store")
        where = f"pack member {exc.member!r}" if exc.member else "pack"
        report.findings.append(Finding("problem", where, exc.rule))
        return report
    except LimitExceededError:
        raise  # over a limit: not read at all (exit 4), the message says how to raise it
    except StoreError as exc:
        if not os.path.lexists(path):
            raise
        # damaged beyond opening: a failed verification naming the file (exit 7)
        where, _, message = str(exc).partition(": ")
        report = VerifyReport(str(path), "packed_store" if path.is_file() else "store")
        report.findings.append(Finding("problem", where, message or where))
        return report
    try:
        return verify_store(store, chain=chain)
    finally:
        store.close()
