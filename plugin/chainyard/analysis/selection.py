"""Which draws of a run's replica stores an export, summary or plot uses.

* derived stores (after ``derive`` or the workflow's trim/thin): their rows, which are already
  the recorded burn-in/thinning selection;
* sampled stores with a burn-in record (and a thinning record): the rows those decisions keep,
  the same rows ``derive`` would write, read in place without copying;
* sampled stores with ``raw``: every committed row (burn-in included).

A sampled store given without records or ``raw`` is refused, so burn-in never slips into a
result unnoticed; ``raw`` together with a record is refused as a contradiction. A derived
store whose burn-in was not decided by a record (``derive --discard N``) is read as it is,
and the selection says so (:func:`undecided_burn_in`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.analysis.records import read_record
from chainyard.errors import ConfigError, StoreError
from chainyard.store import Store

__all__ = [
    "SelectedStore",
    "Selection",
    "choose_selection",
    "row_map",
    "same_run",
    "selected",
    "undecided_burn_in",
]


@dataclass(frozen=True)
class Selection:
    """Rows ``discard, discard + factor, ...`` of every replica store, ``draws`` of them.

    ``first_step`` and ``step_stride`` map a kept row to the sampler step it was taken after
    (``first_step + k * step_stride`` for the k-th kept row).
    """

    discard: int
    factor: int
    draws: int
    first_step: int
    step_stride: int
    description: str
    records: tuple[Path, ...] = field(default=())
    note: str | None = None

    def steps(self) -> NDArray[np.int64]:
        """The sampler step of every kept draw, shape (draws,)."""
        return self.first_step + self.step_stride * np.arange(self.draws, dtype=np.int64)


def row_map(attrs: dict[str, Any]) -> tuple[int, int]:
    """``(offset, stride)``: row k of this store is row ``offset + stride * k`` of the sampled
    store it comes from (through every derivation)."""
    offset, stride = 0, 1
    derived = attrs.get("derived")
    chain = []
    while isinstance(derived, dict):
        chain.append((int(derived.get("discard", 0)), int(derived.get("factor", 1))))
        derived = derived.get("parent")
    for d, f in reversed(chain):  # innermost (closest to the sampled store) first
        offset, stride = offset + stride * d, stride * f
    return offset, stride


def undecided_burn_in(attrs: dict[str, Any]) -> str | None:
    """For a derived store whose burn-in no decision record set, one sentence saying so.

    A derivation step records ``burn_in_decided`` (``derive`` with a burn-in record, or the
    workflow's selection); stores written before that key existed count as decided when the
    step named any record. Returns None for sampled stores and decided ones.
    """
    derived = attrs.get("derived")
    by_hand = False
    while isinstance(derived, dict):
        decided = derived.get("burn_in_decided")
        if decided is None:
            decided = bool(derived.get("records"))
        if decided:
            return None
        by_hand = by_hand or int(derived.get("discard", 0)) > 0
        derived = derived.get("parent")
    if attrs.get("derived") is None:
        return None
    if by_hand:
        return (
            "burn-in was set by hand (derive --discard), not decided by a record "
            "(`chainyard decide burn-in`)"
        )
    return "burn-in was not decided (derived with --discard 0), so the draws include any burn-in"


def same_run(stores: Sequence[Store]) -> None:
    """Refuse stores that are not replicas of one run at one stage (one line, exit 4).

    Replicas of one run share everything that determines the draws except the replica index
    (model and data content, seed, walkers, moves, parameters, blobs) and, for derived
    stores, the same burn-in and thinning.
    """
    from chainyard.engine.identity import describe_differences

    if not stores:
        raise StoreError("no stores given")
    first = stores[0]
    ref = {k: v for k, v in (first.attrs.get("identity") or {}).items() if k != "replica"}
    seen: dict[int, Path] = {}
    for s in stores:
        if s.replica in seen:
            raise StoreError(f"{s.path}: replica {s.replica} given twice (also {seen[s.replica]})")
        seen[s.replica] = Path(s.path)
        ident = {k: v for k, v in (s.attrs.get("identity") or {}).items() if k != "replica"}
        if ident != ref:
            what = "; ".join(describe_differences(ref, ident)) or "identity"
            raise StoreError(
                f"{s.path}: not a replica of the same run as {first.path} (differs in {what}); "
                "give the replica stores of one run"
            )
        if row_map(s.attrs) != row_map(first.attrs):
            raise StoreError(
                f"{s.path}: burn-in/thinning differ from {first.path}; give the replicas of "
                "one run at one stage (all sampled, or all after the same decisions)"
            )
        if s.steps_done == 0:
            raise StoreError(f"{s.path}: no committed steps")


def _check_decided_on(record: dict[str, Any], stores: Sequence[Store], path: Path) -> None:
    """Refuse a burn-in record that was not decided on these stores as they are now."""
    from chainyard.provenance.inputs import store_digest

    decided = {i.get("sha256") for i in record.get("inputs", []) if isinstance(i, dict)}
    for s in stores:
        if store_digest(s) not in decided:
            raise StoreError(
                f"{path}: decided on other stores than {s.path} as it is now (a record "
                "names its stores by content hash; extended or other stores need a new "
                "`chainyard decide burn-in`)"
            )


def choose_selection(
    stores: Sequence[Store],
    *,
    raw: bool = False,
    burn_in_record: str | Path | None = None,
    thinning_record: str | Path | None = None,
) -> Selection:
    """Which rows of the stores to export.

    * derived stores (after ``derive`` or the workflow's trim/thin): their rows, which are
      already the recorded burn-in/thinning selection;
    * sampled stores with ``burn_in_record``/``thinning_record``: the rows those decisions
      keep (the same rows ``derive`` would write);
    * sampled stores with ``raw``: every committed row.

    Raises
    ------
    StoreError
        For sampled stores without records or ``raw`` (burn-in would be exported silently),
        ``raw`` or records with derived stores, or fewer than one row left (exit 4).
    """
    records = tuple(Path(r) for r in (burn_in_record, thinning_record) if r is not None)
    if raw and records:
        which = "--burn-in-record" if burn_in_record is not None else "--thinning-record"
        raise ConfigError(
            f"--raw (every draw, burn-in included) contradicts {which} (the recorded "
            "selection); give one or the other"
        )
    same_run(stores)
    derived = "derived" in stores[0].attrs
    if derived and (raw or records):
        what = "--raw" if raw else "a decision record"
        raise StoreError(
            f"{stores[0].path}: a derived store (burn-in/thinning already applied); {what} "
            "needs the sampled stores (e.g. draws/replica-R.zarr)"
        )
    if not derived and not raw and not records:
        raise StoreError(
            f"{stores[0].path}: a sampled store (burn-in included); give --burn-in-record "
            "(and --thinning-record) to use the recorded selection, --raw for every draw, "
            "or the derived stores (e.g. standalone/replica-R.zarr)"
        )
    discard, factor = 0, 1
    if burn_in_record is not None:
        rec = read_record(burn_in_record, "chainyard.burn_in_decision")
        discard = int(rec["decision"]["steps_discarded"])
        _check_decided_on(rec, stores, Path(burn_in_record))
    if thinning_record is not None:
        rec = read_record(thinning_record, "chainyard.thinning_decision")
        factor = int(rec["decision"]["factor"])
    shortest = min(s.steps_done for s in stores)
    if factor < 1 or not 0 <= discard < shortest:
        raise StoreError(
            f"cannot discard {discard:,} of {shortest:,} steps (thinning factor {factor}); "
            "the records do not fit these stores"
        )
    draws = len(range(discard, shortest, factor))
    offset, stride = row_map(stores[0].attrs)
    note = undecided_burn_in(stores[0].attrs) if derived else None
    if derived and note:
        description = f"the derived stores' draws; {note}"
    elif derived:
        description = "the derived stores' draws (burn-in and thinning as recorded in them)"
    elif records:
        description = f"burn-in {discard:,} steps discarded, every {factor} kept (from records)"
    else:
        description = "every committed draw (--raw: burn-in included)"
    return Selection(
        discard=discard,
        factor=factor,
        draws=draws,
        first_step=1 + offset + stride * discard,
        step_stride=stride * factor,
        description=description,
        records=records,
        note=note,
    )


class SelectedStore:
    """The kept rows of one store under a :class:`Selection`, with a store's reading API.

    Rows ``discard, discard + factor, ...`` (``selection.draws`` of them) are read in place;
    used so that ``diagnose`` and the plots see exactly the exported draws.
    """

    def __init__(self, store: Store, selection: Selection) -> None:
        self.store, self.selection = store, selection
        self.path = store.path
        self.param_names = store.param_names
        self.blob_names = store.blob_names
        self.walkers = store.walkers
        self.replica = store.replica
        self.steps_done = selection.draws

    @property
    def chunk_steps(self) -> int:
        """Kept rows per stored chunk (at least 1)."""
        return max(1, self.store.chunk_steps // self.selection.factor)

    @property
    def config(self) -> Any:
        """The run configuration of the underlying store."""
        return self.store.config

    @property
    def attrs(self) -> dict[str, Any]:
        """The underlying store's attributes."""
        return self.store.attrs

    def _rows(self, name: str, start: int, stop: int | None) -> NDArray[Any]:
        a, b, _ = slice(start, stop).indices(self.steps_done)
        b = max(a, b)
        sel = self.selection
        if b == a:
            lo = sel.discard + a * sel.factor
            return self.store.read_rows(name, lo, lo)
        lo, hi = sel.discard + a * sel.factor, sel.discard + (b - 1) * sel.factor + 1
        return self.store.read_rows(name, lo, hi, sel.factor)

    def column(
        self, param: int | str, start: int = 0, stop: int | None = None
    ) -> NDArray[np.float64]:
        """One parameter, shape (steps, walkers)."""
        j = self.param_names.index(param) if isinstance(param, str) else int(param)
        return np.ascontiguousarray(self._rows("position", start, stop)[:, :, j])

    def draws(self, start: int = 0, stop: int | None = None) -> NDArray[np.float64]:
        """Positions, shape (steps, walkers, params)."""
        return self._rows("position", start, stop)

    def log_prob(self, start: int = 0, stop: int | None = None) -> NDArray[np.float64]:
        """Log-probabilities, shape (steps, walkers)."""
        return self._rows("log_prob", start, stop)

    def accepted(self, start: int = 0, stop: int | None = None) -> NDArray[np.bool_]:
        """Acceptance flags, shape (steps, walkers)."""
        return self._rows("accepted", start, stop)

    def blob(self, name: str, start: int = 0, stop: int | None = None) -> NDArray[np.float64]:
        """One blob, shape (steps, walkers)."""
        return self._rows(f"blob/{name}", start, stop)


def selected(stores: Sequence[Store], selection: Selection) -> list[SelectedStore]:
    """Every store (sorted by replica) seen through ``selection``."""
    return [SelectedStore(s, selection) for s in sorted(stores, key=lambda s: s.replica)]
