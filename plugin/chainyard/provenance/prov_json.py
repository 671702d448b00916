"""Export of a provenance record as W3C PROV (PROV-JSON), serialised by the ``prov`` library.

The mapping (namespace ``cy`` = ``urn:chainyard:``):

* entities: the subject (``cy:store-SHA``, ``cy:record-SHA``), every run's store, its config
  (``cy:config-SHA``, with seed, replica and spawn key) and source files (``cy:file-SHA``),
  every input; each with ``cy:sha256`` and ``prov:label`` (its path);
* activities: each segment of a run's history (``cy:segment-SHA-K``, type ``cy:start``,
  ``cy:resume`` or ``cy:extend``, with start/end times, steps and host), each derivation
  step (``cy:derive-SHA-K``) and the computation of a record (``cy:compute-SHA``);
* agents: the software that ran each activity (``cy:chainyard-VERSION``, a
  ``prov:SoftwareAgent`` with the Python, numpy, emcee and zarr versions);
* relations: ``used``, ``wasGeneratedBy``, ``wasDerivedFrom``, ``wasInformedBy`` (segment
  after segment) and ``wasAssociatedWith``.
"""

from __future__ import annotations

import datetime as _dt
from typing import Any

from prov.model import PROV_LABEL, PROV_TYPE, ProvDocument

__all__ = ["NAMESPACE", "prov_document", "prov_json"]

NAMESPACE = "urn:chainyard:"


def _time(text: Any) -> _dt.datetime | None:
    if not text:
        return None
    try:
        return _dt.datetime.fromisoformat(str(text).replace("Z", "+00:00"))
    except ValueError:
        return None


class _Builder:
    def __init__(self) -> None:
        self.doc = ProvDocument()
        self.doc.add_namespace("cy", NAMESPACE)
        self.seen: set[str] = set()

    def qname(self, text: str) -> Any:
        return self.doc.valid_qualified_name(text)

    def entity(self, ident: str, label: Any, sha: Any, **attrs: Any) -> str:
        if ident not in self.seen:
            self.seen.add(ident)
            extra = {f"cy:{k}": v for k, v in attrs.items() if v is not None}
            self.doc.entity(ident, {PROV_LABEL: str(label), "cy:sha256": str(sha), **extra})
        return ident

    def agent(self, software: dict[str, Any] | None) -> str | None:
        if not software:
            return None
        ident = f"cy:chainyard-{software.get('chainyard')}"
        if ident not in self.seen:
            self.seen.add(ident)
            attrs = {f"cy:{k}": str(v) for k, v in software.items() if v is not None}
            self.doc.agent(ident, {PROV_TYPE: self.qname("prov:SoftwareAgent"), **attrs})
        return ident

    def ref(self, ref: dict[str, Any] | None, kind: str = "file") -> str | None:
        if not ref or not ref.get("sha256"):
            return None
        prefix = "store" if kind == "store" else "file"
        return self.entity(
            f"cy:{prefix}-{ref['sha256']}", ref.get("path"), ref["sha256"], kind=kind
        )

    def run(self, run: dict[str, Any]) -> str | None:
        store = self.ref(run.get("store"), "store")
        cfg = self.entity(
            f"cy:config-{run.get('config_sha256')}",
            run.get("config_source") or "run configuration",
            run.get("config_sha256"),
            kind="config",
            seed=run.get("seed"),
            replica=run.get("replica"),
            spawn_key=",".join(str(k) for k in (run.get("spawn_keys") or {}).get("sampler") or []),
        )
        used = [cfg, *(self.ref(s, s.get("role", "file")) for s in run.get("sources") or [])]
        previous = None
        tag = str((run.get("store") or {}).get("sha256"))[:16]
        for k, seg in enumerate(run.get("segments") or []):
            act = f"cy:segment-{tag}-{k}"
            self.doc.activity(
                act,
                _time(seg.get("started_utc")),
                _time(seg.get("ended_utc")),
                {
                    PROV_TYPE: self.qname(f"cy:{seg.get('kind')}"),
                    "cy:from_step": int(seg.get("from_step") or 0),
                    "cy:to_step": int(seg.get("to_step") or 0),
                    "cy:host": str(seg.get("host")),
                },
            )
            for u in used:
                if u:
                    self.doc.used(act, u)
            agent = self.agent(seg.get("software"))
            if agent:
                self.doc.wasAssociatedWith(act, agent)
            if previous:
                self.doc.wasInformedBy(act, previous)
            previous = act
        if store and previous:
            self.doc.wasGeneratedBy(store, previous)
        return store


def prov_document(record: dict[str, Any]) -> ProvDocument:
    """A :class:`prov.model.ProvDocument` for a provenance record (see module docstring)."""
    b = _Builder()
    subject = record["subject"]
    kind = subject.get("kind")
    prefix = "record" if kind == "record" else "store"
    me = b.entity(
        f"cy:{prefix}-{subject['sha256']}",
        subject.get("path"),
        subject["sha256"],
        kind=subject.get("record_kind") or kind,
        steps=subject.get("steps"),
    )
    for run in record.get("runs") or []:
        b.run(run)
    agent = b.agent((record.get("generated_by") or {}).get("software"))
    current = me
    tag = str(subject["sha256"])[:16]
    for k, step in enumerate(record.get("derivation") or []):
        act = f"cy:derive-{tag}-{k}"
        when = _time(step.get("created_utc"))
        b.doc.activity(
            act,
            when,
            when,
            {
                "cy:discard": int(step.get("discard") or 0),
                "cy:factor": int(step.get("factor") or 1),
            },
        )
        source = b.ref(step.get("source"), "store")
        for r in step.get("records") or []:
            rec = b.ref(r, "record")
            if rec:
                b.doc.used(act, rec)
        if source:
            b.doc.used(act, source)
            b.doc.wasDerivedFrom(current, source, act)
        b.doc.wasGeneratedBy(current, act)
        if agent and k == 0:
            b.doc.wasAssociatedWith(act, agent)
        current = source or current
    if kind == "record":
        act = f"cy:compute-{tag}"
        when = _time(record.get("times", {}).get("ended_utc"))
        b.doc.activity(
            act,
            _time(record.get("times", {}).get("started_utc")) or when,
            when,
            {PROV_TYPE: b.qname(f"cy:{subject.get('record_kind')}")},
        )
        for ref in record.get("inputs") or []:
            ent = b.ref(ref, ref.get("kind", "file"))
            if ent:
                b.doc.used(act, ent)
                b.doc.wasDerivedFrom(me, ent, act)
        b.doc.wasGeneratedBy(me, act)
        if agent:
            b.doc.wasAssociatedWith(act, agent)
    return b.doc


def prov_json(record: dict[str, Any], indent: int = 1) -> str:
    """The PROV-JSON text of a provenance record."""
    return str(prov_document(record).serialize(format="json", indent=indent))
