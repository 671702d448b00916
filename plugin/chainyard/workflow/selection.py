"""A run's selection: which stored steps the later workflow steps read.

The workflow never copies draws to drop burn-in or to thin. ``decide`` writes one small record
per run (``RUN/decisions/selection.json``, kind ``chainyard.selection``): the replica stores
it applies to (path and content hash), how many steps are used (``steps_used``: the config's
``sampler.steps``, even when the stores hold more from an earlier, longer run; stored draws
are never deleted), the first kept step (the burn-in cut) and the thinning factor. Later
steps open the stores through :class:`~chainyard.analysis.view.StoreWindow` views of
exactly those steps. A standalone store of the selected steps is written only on request
(the ``standalone`` rule, or ``chainyard derive``).
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

from chainyard.analysis.records import read_record
from chainyard.analysis.replicas import open_replicas
from chainyard.analysis.view import StoreWindow
from chainyard.store import Store

__all__ = ["SELECTION_KIND", "Selection", "read_selection"]

SELECTION_KIND = "chainyard.selection"


class Selection:
    """The steps ``first_kept, first_kept + every, ...`` below ``steps_used`` of each store.

    Parameters
    ----------
    steps_used : int
        Steps of each replica the run uses (from step 0).
    first_kept : int
        Burn-in cut: steps before it are left out.
    every : int
        Thinning factor.
    """

    def __init__(self, steps_used: int, first_kept: int, every: int) -> None:
        self.steps_used, self.first_kept, self.every = int(steps_used), int(first_kept), int(every)

    def to_dict(self) -> dict[str, int]:
        """The body of a selection record."""
        return {"steps_used": self.steps_used, "first_kept": self.first_kept, "every": self.every}

    def used(self, stores: Sequence[Store]) -> list[StoreWindow]:
        """Views of the used steps (burn-in included, not thinned), for traces and acceptance."""
        return [StoreWindow(s, 0, self.steps_used) for s in stores]

    def kept(self, stores: Sequence[Store]) -> list[StoreWindow]:
        """Views of the selected steps (after burn-in, thinned): what diagnostics read."""
        return [StoreWindow(s, self.first_kept, self.steps_used, self.every) for s in stores]


def read_selection(path: str | Path, stores: Sequence[str | Path]) -> tuple[Selection, list[Any]]:
    """The selection record at ``path`` and the replica stores it applies to (opened)."""
    rec = read_record(path, SELECTION_KIND)
    sel = Selection(rec["steps_used"], rec["first_kept"], rec["every"])
    return sel, open_replicas(stores)
