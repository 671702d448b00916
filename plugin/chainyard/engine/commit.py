"""One commit, described in plain values and applied to a store.

The run loop describes each commit as a :class:`CommitJob` (JSON-able: step range, RNG state,
the run's segment) plus the rows from the chunk boundary before it. :func:`apply_commit`
writes the rows, then the commit record; the same function runs on the writer thread or in
the commit process (:mod:`chainyard.engine.commit_process`), so both write the same bytes.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, fields
from typing import Any

from numpy.typing import NDArray

from chainyard.engine.buffer import update_checksums
from chainyard.facts import utc_now
from chainyard.store import Store
from chainyard.testhooks import instant

__all__ = ["CommitJob", "apply_commit"]


@dataclass(frozen=True)
class CommitJob:
    """What one commit makes durable.

    Attributes
    ----------
    origin : int
        Chunk boundary at or before ``start``: row 0 of the rows handed with the job.
    start, upto : int
        Steps ``[start, upto)`` become committed (``start`` is the current ``steps_done``).
    random_state : dict
        The sampler's RNG state after step ``upto`` (JSON values).
    segment : dict
        This run's segment record (kind, from_step, host, ...); ``to_step`` and
        ``ended_utc`` are filled in here.
    first : bool
        True for the first commit of this run: the segment is appended, not replaced.
    fsync : bool
        Flush chunk files, folders and the record to disk.
    """

    origin: int
    start: int
    upto: int
    random_state: dict[str, Any]
    segment: dict[str, Any]
    first: bool
    fsync: bool

    def to_json(self) -> dict[str, Any]:
        """The job as JSON values (shallow: the fields already are; ``dataclasses.asdict``
        would deep-copy the 624-word RNG key element by element on the sampling thread)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> CommitJob:
        """A job from :meth:`to_json`'s values."""
        return cls(**data)


def apply_commit(store: Store, rows: Mapping[str, NDArray[Any]], job: CommitJob) -> None:
    """Write ``rows`` (steps ``[job.origin, job.upto)``) and then the new commit record.

    The record is built on the store's committed record as it is on disk now, so commits
    made by another writer of this run (the thread before a commit process took over) are
    carried forward. The rename of ``commit.json`` inside :meth:`Store.commit` is the
    commit point. The test-only kill instants ``chunks-written`` and ``commit-replaced``
    (:mod:`chainyard.testhooks`) sit just before and after it, in whichever process runs
    this (the helper process inherits ``CHAINYARD_TEST_KILL_AT`` and counts on its own).
    """
    store.reload_commit()
    record = store.commit_record
    if int(record["steps_done"]) != job.start:
        raise RuntimeError(
            f"commit of steps {job.start}..{job.upto} on a store at step {record['steps_done']}"
        )
    store.write_steps(dict(rows), job.origin, job.start, job.upto, fsync=job.fsync)

    def rows_between(a: int, b: int) -> dict[str, NDArray[Any]]:
        return {k: v[a - job.origin : b - job.origin] for k, v in rows.items()}

    now = utc_now()
    segment = {**job.segment, "to_step": job.upto, "ended_utc": now}
    segments = list(record.get("segments", []))
    segments = [*segments, segment] if job.first else [*segments[:-1], segment]
    new = {
        **record,
        "checksums": update_checksums(
            record.get("checksums", {}), rows_between, job.start, job.upto, store.chunk_steps
        ),
        "steps_done": job.upto,
        "random_state": job.random_state,
        "updated_utc": now,
        "segments": segments,
    }
    instant("chunks-written")  # test-only kill point: rows flushed, record not replaced
    store.commit(new, fsync=job.fsync)
    instant("commit-replaced")
