"""The provenance record of a result (format ``chainyard.provenance``, version 1).

A provenance record answers, for one *subject* (a store, a derived store or a JSON record),
what produced it, from which inputs, with which settings and software, and when::

    {
      "format": "chainyard.provenance", "format_version": 1,
      "subject":      {"kind", "path", "sha256", "digest_of", "record_kind"?, "steps"?},
      "generated_by": {"software": {...}, "platform": {...}, "git": {...} | null, "utc"},
      "times":        {"started_utc", "ended_utc"},
      "runs":         [RUN, ...],        # one per sampled replica the subject descends from
      "derivation":   [STEP, ...],       # derived stores: burn-in/thinning steps, newest first
      "inputs":       [{"path", "kind", "sha256"}, ...],
      "missing":      ["dotted.field", ...]   # required fields this record could not fill
    }

    RUN = {"store": {"path", "sha256"}, "origin", "config", "config_sha256", "config_source",
           "sources": [{"role", "path", "sha256"}], "seed", "replica", "walkers",
           "param_names", "spawn_keys": {"init", "sampler"}, "sampler_kind", "git",
           "created_utc", "started_utc", "ended_utc", "steps", "segments", "resumed",
           "extended", "software_at_start", "platform_at_start"}

``subject.sha256`` of a store is SHA-256 over its ``zarr.json`` and ``commit.json`` bytes
(which hold every chunk checksum); of a file, SHA-256 of its bytes. ``RUN.origin`` says
where the run facts came from: ``"recorded"`` (in the subject itself), ``"resolved: PATH"``
(read from an input found at its recorded path with a matching content hash) or ``"packed:
..."`` (from the record written into the pack, which describes this very store). Building a
record reads JSON and zarr metadata only; nothing is imported or executed.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from chainyard.errors import StoreError
from chainyard.provenance import git_state, host_record, software_versions, utc_now
from chainyard.provenance.completeness import REQUIRED_FIELDS, missing_fields
from chainyard.provenance.inputs import (
    file_digest,
    input_candidates,
    open_matching,
    store_digest,
)
from chainyard.store import Store

__all__ = [
    "RECORD_FORMAT",
    "RECORD_VERSION",
    "REQUIRED_FIELDS",
    "file_digest",
    "input_candidates",
    "missing_fields",
    "open_matching",
    "provenance_record",
    "read_output_record",
    "run_section",
    "stamp",
    "store_digest",
]

RECORD_FORMAT = "chainyard.provenance"
RECORD_VERSION = 1


def _sources(identity: dict[str, Any]) -> list[dict[str, Any]]:
    out = []
    for role, key in (
        ("model", "model_source"),
        ("data", "data"),
        ("data_loader", "data_loader"),
        ("initial_positions", "initial_positions"),
    ):
        rec = identity.get(key)
        if rec:
            out.append({"role": role, "path": rec.get("path"), "sha256": rec.get("sha256")})
    for rec in identity.get("extra_sources") or []:
        if rec:
            out.append(
                {"role": "model_extra", "path": rec.get("path"), "sha256": rec.get("sha256")}
            )
    return out


def _segment(seg: dict[str, Any]) -> dict[str, Any]:
    keys = ("kind", "from_step", "to_step", "host", "pid", "started_utc", "ended_utc")
    return {
        **{k: seg.get(k) for k in keys},
        "config_sha256": seg.get("config_hash"),
        "software": seg.get("software"),
    }


def run_section(store: Store, *, resolve: bool = True) -> dict[str, Any]:
    """The RUN entry for the sampled replica behind ``store`` (see module docstring).

    For a derived store, the run facts copied into its attributes are used; the segment
    history comes from ``attrs["derived"]["run"]`` when recorded, else (``resolve``) from
    the source store found at its recorded path with a matching digest.
    """
    attrs = store.attrs
    derived = attrs.get("derived")
    if derived and resolve:
        source = open_matching(derived.get("source"), store.path)
        if source is not None:
            inner = run_section(source, resolve=True)
            if inner["origin"] == "recorded":
                inner["origin"] = f"resolved: {source.path}"
            return inner
    packed = _packed_run(store) if derived else None
    if packed is not None:
        return packed
    prov = attrs.get("provenance") or {}
    if derived:
        recorded = derived.get("run") or {}
        segments = recorded.get("segments")
        ref, steps = recorded.get("store") or _root_source(derived), recorded.get("steps_done")
    else:
        segments = store.commit_record.get("segments", [])
        ref, steps = {"path": str(store.path), "sha256": store_digest(store)}, store.steps_done
    segs = [_segment(s) for s in segments] if segments is not None else None
    replica = attrs.get("replica")
    return {
        "store": ref,
        "origin": "recorded",
        "config": attrs.get("config"),
        "config_sha256": attrs.get("config_hash"),
        "config_source": attrs.get("config_source"),
        "sources": _sources(attrs.get("identity") or {}),
        "seed": attrs.get("seed"),
        "replica": replica,
        "walkers": attrs.get("walkers"),
        "param_names": attrs.get("param_names"),
        "spawn_keys": {"init": [replica, 0], "sampler": attrs.get("spawn_key")},
        "sampler_kind": (attrs.get("identity") or {}).get("sampler_kind"),
        "git": prov.get("git"),
        "created_utc": prov.get("created_utc"),
        "started_utc": segs[0]["started_utc"] if segs else None,
        "ended_utc": segs[-1]["ended_utc"] if segs else None,
        "steps": steps,
        "segments": segs,
        "resumed": any(s["kind"] == "resume" for s in segs) if segs is not None else None,
        "extended": any(s["kind"] == "extend" for s in segs) if segs is not None else None,
        "software_at_start": prov.get("software"),
        "platform_at_start": prov.get("host"),
    }


def _packed_run(store: Store) -> dict[str, Any] | None:
    """The RUN entry recorded in a pack's provenance.json, if it describes this very store."""
    raw = store.read_bytes("pack/provenance.json")
    try:
        rec = json.loads(raw) if raw is not None else None
    except ValueError:
        return None
    if not rec or (rec.get("subject") or {}).get("sha256") != store_digest(store):
        return None
    runs = rec.get("runs") or []
    if not runs or runs[0].get("segments") is None:
        return None
    return {**runs[0], "origin": f"packed: {runs[0].get('origin', 'recorded')}"}


def _root_source(derived: dict[str, Any]) -> dict[str, Any] | None:
    while derived.get("parent"):
        derived = derived["parent"]
    return derived.get("source")


def _derivation(derived: dict[str, Any] | None) -> list[dict[str, Any]]:
    out = []
    while derived:
        out.append(
            {
                "source": derived.get("source"),
                "discard": derived.get("discard"),
                "factor": derived.get("factor"),
                "source_steps": derived.get("source_steps"),
                "records": derived.get("records", []),
                "created_utc": derived.get("created_utc"),
            }
        )
        derived = derived.get("parent")
    return out


def _store_record(store: Store, resolve: bool) -> dict[str, Any]:
    attrs = store.attrs
    derived = attrs.get("derived")
    writer = attrs.get("created_by") or {}
    prov = attrs.get("provenance") or {}
    run = run_section(store, resolve=resolve)
    if derived:
        inputs = [derived["source"], *derived.get("records", [])]
        times = {"started_utc": writer.get("utc"), "ended_utc": derived.get("created_utc")}
    else:
        inputs = [
            {"path": s["path"], "kind": s["role"], "sha256": s["sha256"]} for s in run["sources"]
        ]
        times = {"started_utc": run["started_utc"], "ended_utc": run["ended_utc"]}
    last = (run["segments"] or [{}])[-1] if not derived else {}
    return {
        "subject": {
            "kind": "derived_store" if derived else "store",
            "path": str(store.path),
            "sha256": store_digest(store),
            "digest_of": "zarr.json + commit.json",
            "steps": store.steps_done,
            "packed": store.packed,
        },
        "generated_by": {
            "software": writer.get("software") or last.get("software") or prov.get("software"),
            "platform": writer.get("host") or prov.get("host"),
            "git": writer.get("git", prov.get("git")),
            "utc": writer.get("utc") or prov.get("created_utc"),
        },
        "times": times,
        "runs": [run],
        "derivation": _derivation(derived),
        "inputs": inputs,
    }


def read_output_record(path: Path) -> dict[str, Any]:
    """The record an output carries: a JSON record, a sidecar, or a PNG's metadata block.

    Raises
    ------
    StoreError
        If there is no readable record with an ``inputs`` list.
    """
    try:
        if path.suffix.lower() == ".png":
            from chainyard.provenance.png_text import read_png_stamp

            rec: Any = read_png_stamp(path)
        else:
            rec = json.loads(path.read_text())
    except (OSError, ValueError) as exc:
        raise StoreError(f"{path}: not a readable record ({exc})") from None
    if not isinstance(rec, dict) or not isinstance(rec.get("inputs"), list):
        raise StoreError(f"{path}: carries no chainyard record (no 'inputs' list)")
    return rec


def _json_record(path: Path, resolve: bool) -> dict[str, Any]:
    rec = read_output_record(path)
    prov = rec.get("provenance") or {}
    runs = prov.get("runs")
    if runs is None and resolve:
        runs = []
        for ref in rec["inputs"]:
            store = open_matching(ref, path) if ref.get("kind") == "store" else None
            if store is not None:
                run = run_section(store, resolve=True)
                if run["origin"] == "recorded":
                    run["origin"] = f"resolved: {store.path}"
                runs.append(run)
    platform = prov.get("platform")
    if platform is None and isinstance(prov.get("host"), dict):
        platform = prov["host"]
    subject = {
        "kind": "record",
        "record_kind": rec.get("kind"),
        "path": str(path),
        "sha256": file_digest(path),
        "digest_of": "file bytes",
    }
    if isinstance(rec.get("output"), dict):  # a sidecar describes its output file
        out = rec["output"]
        subject = {
            **subject,
            "kind": "file",
            "path": out.get("path"),
            "sha256": out.get("sha256"),
            "sidecar": str(path),
        }
    elif path.suffix.lower() == ".png":
        subject = {**subject, "kind": "plot", "record_kind": "png metadata"}
    return {
        "subject": subject,
        "generated_by": {
            "software": prov.get("software"),
            "platform": platform,
            "git": prov.get("git"),
            "utc": prov.get("created_utc"),
        },
        "times": {"started_utc": prov.get("started_utc"), "ended_utc": prov.get("created_utc")},
        "runs": runs or [],
        "derivation": [],
        "inputs": rec["inputs"],
    }


def provenance_record(target: Store | str | Path, *, resolve: bool = True) -> dict[str, Any]:
    """The provenance record of a store, packed store or JSON record.

    Parameters
    ----------
    target : Store, str or Path
        A store (directory or packed zip) or a JSON decision/diagnostics record.
    resolve : bool
        Fill facts the subject does not hold itself from its inputs, when they are found at
        their recorded paths with matching content hashes.

    Returns
    -------
    dict
        The record (module docstring), with ``missing`` listing unfilled required fields.
    """
    if isinstance(target, Store):
        body = _store_record(target, resolve)
    else:
        path = Path(target)
        if path.is_file() and path.suffix.lower() in (".json", ".png"):
            body = _json_record(path, resolve)
        else:
            body = _store_record(Store.open(path), resolve)
    record = {"format": RECORD_FORMAT, "format_version": RECORD_VERSION, **body}
    record["missing"] = missing_fields(record)
    return record


def stamp(inputs: Sequence[Store | Path], *, started_utc: str | None = None) -> dict[str, Any]:
    """The ``provenance`` block for a new output derived from ``inputs``.

    Meant for records, sidecar files and plot metadata: it holds the writing process's
    software, platform, git state of the working directory and times, and the RUN entry of
    every input store, so the output answers the provenance questions on its own.

    Parameters
    ----------
    inputs : sequence of Store or Path
        What the output is computed from.
    started_utc : str, optional
        When the computation began (default: now).
    """
    now = utc_now()
    runs = [run_section(i) for i in inputs if isinstance(i, Store)]
    return {
        "format": RECORD_FORMAT,
        "format_version": RECORD_VERSION,
        "software": software_versions(),
        "platform": host_record(),
        "host": host_record()["host"],
        "git": git_state(Path.cwd()),
        "started_utc": started_utc or now,
        "created_utc": now,
        "runs": runs,
    }
