"""Where ``chainyard plot`` may write its PNG files."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from chainyard.analysis.outputs import _enclosing_store, store_kind
from chainyard.errors import StoreError

__all__ = ["PLOT_NAMES", "check_plot_folder"]

#: the files ``chainyard plot`` writes (and replaces) in its folder
PLOT_NAMES = ("traces.png", "tau.png", "pairs.png", "acceptance.png")


def check_plot_folder(folder: Path, inputs: Sequence[Path]) -> None:
    """Refuse a plot folder that is a store, inside one, an input or not a folder (exit 4).

    Only the four files :data:`PLOT_NAMES` are written in it (replacing earlier plots of those
    names); nothing else in the folder is touched.
    """
    target = folder.resolve()
    why = None
    if store_kind(target) is not None:
        why = "it is a store"
    elif _enclosing_store(target) is not None:
        why = f"it is inside the chainyard store {_enclosing_store(target)}"
    elif target.exists() and not target.is_dir():
        why = "it exists and is not a folder"
    else:
        for item in inputs:
            if item.resolve() == target:
                why = f"it is an input ({item})"
    if why is None:
        for name in PLOT_NAMES:
            f = target / name
            if f.is_symlink() or (f.exists() and not f.is_file()):
                why = f"{name} there is not a regular file"
    if why is not None:
        raise StoreError(f"{folder}: refusing to write the plots there: {why}")
