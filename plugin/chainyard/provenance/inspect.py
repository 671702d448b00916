"""``chainyard inspect``: a human summary of a store (and its JSON form).

What was sampled, when and for how long, the steps, replica and history (resumed or
extended), the convergence verdict when a diagnostics record is found, and the provenance
highlights. Integrity is checked at the metadata level only (seal and counters); ``chainyard
verify`` decodes every chunk. Nothing is imported or executed.
"""

from __future__ import annotations

import datetime as _dt
import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from chainyard.errors import StoreError
from chainyard.provenance.record import provenance_record, store_digest
from chainyard.provenance.verify import DAMAGE, describe_damage, verify_metadata
from chainyard.store import Store

__all__ = ["format_summary", "inspect_store"]

DIAGNOSTICS_KIND = "chainyard.diagnostics"
_MAX_RECORD_BYTES = 8 * 2**20


def _seconds(a: Any, b: Any) -> float | None:
    try:
        t0 = _dt.datetime.fromisoformat(str(a).replace("Z", "+00:00"))
        t1 = _dt.datetime.fromisoformat(str(b).replace("Z", "+00:00"))
    except ValueError:
        return None
    return (t1 - t0).total_seconds()


def _load(data: bytes | None) -> dict[str, Any] | None:
    try:
        rec = json.loads(data or b"")
    except ValueError:
        return None
    return rec if isinstance(rec, dict) else None


def _verdict(store: Store, digest: str, given: Sequence[str | Path]) -> dict[str, Any] | None:
    """The verdict of a diagnostics record naming this store (given, packed or nearby)."""
    candidates: list[tuple[str, dict[str, Any] | None]] = [
        (str(p), _load(Path(p).read_bytes())) for p in given
    ]
    manifest = _load(store.read_bytes("pack/manifest.json")) or {}
    for entry in manifest.get("records", []):
        candidates.append(
            (f"{store.path}!{entry['member']}", _load(store.read_bytes(entry["member"])))
        )
    if not store.packed:
        for folder in (store.path.parent, store.path.parent.parent):
            for p in sorted(folder.glob("*.json")):
                if p.stat().st_size <= _MAX_RECORD_BYTES:
                    candidates.append((str(p), _load(p.read_bytes())))
    for where, rec in candidates:
        if not rec or rec.get("kind") != DIAGNOSTICS_KIND or "verdict" not in rec:
            continue
        named = [i.get("sha256") for i in rec.get("inputs", [])]
        if str(where) in map(str, given) or digest in named:
            verdict = rec["verdict"]
            return {
                "ok": bool(verdict.get("ok")),
                "lines": verdict.get("lines", []),
                "record": where,
                "replicas": rec.get("replicas"),
            }
    checks = _load(store.read_bytes("target_checks.json"))
    if checks and checks.get("checks"):
        last = checks["checks"][-1]
        return {
            "ok": bool(last.get("ok")),
            "lines": last.get("lines", []),
            "record": f"{store.path}/target_checks.json (run-level verdict across "
            f"{len(checks.get('stores') or []) or 1} replica(s))",
        }
    return None


def inspect_store(
    target: str | Path | Store, *, diagnostics: Sequence[str | Path] = ()
) -> dict[str, Any]:
    """The summary of a store as a JSON-ready dict (``chainyard inspect --json``).

    Parameters
    ----------
    target : str, Path or Store
        A store, derived store or packed store.
    diagnostics : sequence of path
        Diagnostics records to take the verdict from (default: one found in the pack, beside
        the store or one folder up, that names this store by content hash).
    """
    store = target if isinstance(target, Store) else Store.open(target)
    try:
        return _summary(store, diagnostics)
    except DAMAGE as exc:
        raise StoreError(
            f"{store.path}: damaged metadata, cannot summarise it ({describe_damage(exc)}); "
            f"`chainyard verify {store.path}` names the problem"
        ) from None


def _summary(store: Store, diagnostics: Sequence[str | Path]) -> dict[str, Any]:
    record = provenance_record(store)
    attrs = store.attrs
    cfg = attrs.get("config") or {}
    run = record["runs"][0]
    segs = run.get("segments") or []
    durations = [_seconds(s.get("started_utc"), s.get("ended_utc")) for s in segs]
    software = record["generated_by"].get("software") or {}
    integrity = verify_metadata(store)
    return {
        "subject": str(store.path),
        "kind": record["subject"]["kind"],
        "packed": store.packed,
        "sha256": record["subject"]["sha256"],
        "what": {
            "config_source": attrs.get("config_source"),
            "description": cfg.get("description"),
            "model": (cfg.get("model") or {}).get("log_prob"),
            "parameters": list(store.param_names),
            "blobs": list(store.blob_names),
            "walkers": store.walkers,
            "seed": attrs.get("seed"),
            "replica": store.replica,
        },
        "steps": {
            "stored": store.steps_done,
            "sampled": run.get("steps"),
            "requested": _requested(cfg.get("sampler") or {}),
            "chunk_steps": store.chunk_steps,
        },
        "sampler": _sampler_facts(store),
        "when": {
            "started_utc": run.get("started_utc"),
            "ended_utc": run.get("ended_utc"),
            "written_utc": record["generated_by"].get("utc"),
        },
        "sampling_seconds": sum(d for d in durations if d is not None) if segs else None,
        "segments": segs,
        "resumed": run.get("resumed"),
        "extended": run.get("extended"),
        "derivation": record["derivation"],
        "verdict": _verdict(store, store_digest(store), diagnostics),
        "provenance": {
            "software": software,
            "platform": (record["generated_by"].get("platform") or {}).get("platform"),
            "git": run.get("git"),
            "config_sha256": run.get("config_sha256"),
            "sources": run.get("sources"),
            "origin": run.get("origin"),
            "missing": record["missing"],
        },
        "integrity": {
            "checked": "metadata (seal, counters, consistency); chunks not decoded",
            "ok": integrity.ok,
            "problems": [str(f) for f in integrity.problems],
        },
    }


def _requested(sampler: dict[str, Any]) -> Any:
    return sampler.get("draws" if sampler.get("kind") == "accept_reject" else "steps")


def _sampler_facts(store: Store) -> dict[str, Any]:
    """Sampler kind, what the walkers axis holds, the frozen Metropolis-Hastings proposal and
    the accept-reject acceptance rate with its binomial SE (over every stored draw)."""
    sampler = (store.attrs.get("config") or {}).get("sampler") or {}
    kind = sampler.get("kind", "ensemble")
    out: dict[str, Any] = {
        "kind": kind,
        "walkers_axis": "walkers" if kind == "ensemble" else "chains",
    }
    state = store.commit_record.get("random_state")
    if kind == "metropolis_hastings" and isinstance(state, dict):
        out["proposal"] = state.get("proposal")
    if kind == "accept_reject" and store.steps_done:
        from chainyard.diagnostics.acceptance import rate_from_counts
        from chainyard.engine.accept_reject import PROPOSALS_BLOB

        name = f"blob/{PROPOSALS_BLOB}"
        if name in store.array_names():
            total = np.zeros(store.walkers)
            for a in range(0, store.steps_done, store.chunk_steps):  # one chunk at a time
                b = min(store.steps_done, a + store.chunk_steps)
                total += store.read_rows(name, a, b).sum(axis=0)
            bound = sampler.get("log_bound")
            out["accept_reject"] = rate_from_counts(
                store.steps_done, total, None if bound is None else float(bound)
            )
    return out


def _history(segs: list[dict[str, Any]]) -> str:
    parts = []
    for s in segs:
        d = _seconds(s.get("started_utc"), s.get("ended_utc"))
        took = f", {d:,.0f} s" if d is not None else ""
        parts.append(f"{s['kind']} {s['from_step']:,}-{s['to_step']:,} on {s.get('host')}{took}")
    return "; ".join(parts) or "none recorded"


def format_summary(s: dict[str, Any]) -> str:
    """The text ``chainyard inspect`` prints."""
    try:
        return _format(s)
    except DAMAGE as exc:
        raise StoreError(
            f"{s.get('subject')}: damaged metadata, cannot summarise it "
            f"({describe_damage(exc)}); `chainyard verify` names the problem"
        ) from None


def _format(s: dict[str, Any]) -> str:
    what, steps, prov = s["what"], s["steps"], s["provenance"]
    kind = {"store": "sampled store", "derived_store": "derived store"}.get(s["kind"], s["kind"])
    cuts = [f"discard {d['discard']:,}, keep 1 in {d['factor']}" for d in s["derivation"]]
    head = f"{s['subject']}: {kind}" + (" (packed)" if s["packed"] else "")
    head += f" ({'; then '.join(reversed(cuts))})" if cuts else ""
    params = ", ".join(what["parameters"])
    lines = [
        head,
        f"  what       {what['config_source']}: {len(what['parameters'])} parameter(s) ({params}), "
        f"{what['walkers']} walkers, seed {what['seed']}, replica {what['replica']}; model "
        f"{what['model']}",
    ]
    if what.get("description"):
        lines.append(f"  about      {what['description']}")
    lines += _sampler_lines(s.get("sampler") or {})
    sampled = steps["sampled"]
    lines.append(
        f"  steps      {steps['stored']:,} stored"
        + (f" of {sampled:,} sampled" if sampled not in (None, steps["stored"]) else "")
        + f" (requested {steps['requested']:,}; chunks of {steps['chunk_steps']:,})"
    )
    when = s["when"]
    lines.append(f"  when       sampled {when['started_utc']} to {when['ended_utc']}")
    if s["kind"] != "store":
        lines[-1] += f"; derived {when['written_utc']}"
    took = s["sampling_seconds"]
    lines.append(
        "  how long   "
        + (
            f"{took:,.0f} s of sampling in {len(s['segments'])} segment(s)"
            if took is not None
            else "not recorded"
        )
    )
    lines.append(f"  history    {_history(s['segments'])}")
    resumed = {True: "yes", False: "no", None: "not recorded"}[s["resumed"]]
    extended = {True: "yes", False: "no", None: "not recorded"}[s["extended"]]
    lines.append(f"  resumed    {resumed}; extended {extended}")
    v = s["verdict"]
    if v is None:
        lines.append("  verdict    not diagnosed here (no diagnostics record given or found)")
    else:
        state = "targets met" if v["ok"] else "targets NOT met"
        lines.append(f"  verdict    {state} (from {v['record']})")
        lines += [f"             {line}" for line in v["lines"][:6]]
    sw = prov["software"] or {}
    lines.append(
        "  software   "
        + ", ".join(f"{k} {sw.get(k)}" for k in ("chainyard", "python", "numpy", "emcee", "zarr"))
        + (f" on {prov['platform']}" if prov.get("platform") else "")
    )
    git = prov.get("git")
    lines.append(
        "  git        "
        + (
            f"{git['commit'][:12]} ({'dirty' if git.get('dirty') else 'clean'})"
            if git
            else "not recorded (not in a git work tree)"
        )
    )
    inputs = [f"config sha256 {str(prov['config_sha256'])[:12]}"]
    inputs += [f"{src['path']} sha256 {str(src['sha256'])[:12]}" for src in prov["sources"] or []]
    lines.append(f"  inputs     {', '.join(inputs)}")
    missing = prov["missing"]
    lines.append(
        "  provenance "
        + ("complete" if not missing else f"incomplete: {', '.join(missing)}")
        + ("" if prov["origin"] == "recorded" else f" (run facts {prov['origin']})")
    )
    integ = s["integrity"]
    lines.append(
        "  integrity  "
        + (
            "seal and counters ok (`chainyard verify` checks every chunk)"
            if integ["ok"]
            else f"{len(integ['problems'])} problem(s): {integ['problems'][0]}"
        )
    )
    return "\n".join(lines)


def _sampler_lines(facts: dict[str, Any]) -> list[str]:
    """The sampler line(s) of ``inspect``: kind, frozen proposal, accept-reject rate."""
    kind = facts.get("kind", "ensemble")
    if kind == "ensemble":
        return []
    lines = [f"  sampler    {kind} (the walkers axis holds independent chains)"]
    prop = facts.get("proposal")
    if isinstance(prop, dict):
        lines.append(f"  proposal   {prop.get('policy')}: {prop.get('reason')}")
    ar = facts.get("accept_reject")
    if ar:
        from chainyard.display import accept_reject_line

        lines.append(
            "  acceptance " + accept_reject_line(ar).removeprefix("Accept-reject: acceptance ")
        )
    return lines
