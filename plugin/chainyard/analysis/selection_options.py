"""The draw-selection options of ``diagnose`` and ``decide thinning``.

They choose draws as ``export``, ``summarise`` and ``plot`` do
(:func:`chainyard.analysis.selection.choose_selection`): derived stores as they are, sampled
stores with ``--burn-in-record`` (and ``--thinning-record``) read in place, or ``--raw``.
A sampled store with neither is refused, so no result says "after burn-in" when nothing was
discarded.
"""

from __future__ import annotations

import argparse
import sys
from typing import Any

__all__ = ["add_selection_options", "selected_stores"]


def add_selection_options(p: argparse.ArgumentParser, prefix: str) -> None:
    """Add ``--burn-in-record``, ``--thinning-record`` and ``--raw`` to ``p``.

    ``prefix`` starts each help text (e.g. ``"thinning: "`` where only one use takes them).
    """
    p.add_argument(
        "--burn-in-record",
        default=None,
        metavar="FILE",
        help=f"{prefix}burn-in decision record (from `chainyard decide burn-in`) to apply to "
        "sampled stores (read in place)",
    )
    p.add_argument(
        "--thinning-record",
        default=None,
        metavar="FILE",
        help=f"{prefix}thinning decision record to apply after the burn-in",
    )
    p.add_argument(
        "--raw",
        action="store_true",
        help=f"{prefix}use every committed draw of sampled stores (burn-in included)",
    )


def selected_stores(args: argparse.Namespace, for_what: str) -> tuple[list[Any], list[Any], Any]:
    """The stores of ``args.stores`` (sorted by replica), views of the selected draws, and
    the :class:`~chainyard.analysis.selection.Selection`.

    Prints a note on stderr when a derived store's burn-in was not decided by a record, or
    when the replicas differ in length (the first ``min`` steps of each are used).

    Raises
    ------
    StoreError
        Sampled stores without a record or ``--raw``, records that do not fit (exit 4).
    ConfigError
        ``--raw`` together with a record (exit 2).
    """
    from chainyard.analysis.replicas import open_replicas
    from chainyard.analysis.selection import choose_selection, selected

    stores = sorted(open_replicas(args.stores), key=lambda s: s.replica)
    selection = choose_selection(
        stores,
        raw=args.raw,
        burn_in_record=args.burn_in_record,
        thinning_record=getattr(args, "thinning_record", None),
    )
    if selection.note:
        print(f"note: {stores[0].path}: {selection.note}", file=sys.stderr)
    lengths = {s.steps_done for s in stores}
    if len(lengths) > 1:
        print(
            f"note: the replicas hold {min(lengths):,} to {max(lengths):,} steps; {for_what} "
            f"the first {min(lengths):,} of each (chains of equal length)",
            file=sys.stderr,
        )
    return stores, selected(stores, selection), selection
