"""Keeping a sampling job's imports to what it uses.

emcee (3.1) imports ``scipy.stats`` at import time only for its KDE move, which chainyard
does not offer; that import is about 0.6 s of CPU, more than half of what a small sampling job
costs beyond its own sampling. :func:`import_emcee_without_kde` imports emcee with
``scipy.stats`` blocked for the duration of that import (emcee then leaves its KDE move
without a backend), and unblocks it at once, so any later ``import scipy.stats`` works as
usual. If an emcee version needs ``scipy.stats`` for anything else, emcee is imported
normally.
"""

from __future__ import annotations

import sys

__all__ = ["import_emcee_without_kde"]


def import_emcee_without_kde() -> None:
    """Import emcee without its KDE move's ``scipy.stats`` (no effect if already imported)."""
    if "emcee" in sys.modules or "scipy.stats" in sys.modules:
        return
    sys.modules["scipy.stats"] = None  # type: ignore[assignment]  # blocks the import
    try:
        import emcee
    except ImportError:
        for name in [m for m in sys.modules if m == "emcee" or m.startswith("emcee.")]:
            del sys.modules[name]
    finally:
        del sys.modules["scipy.stats"]
    import emcee  # noqa: F401  # already imported, or imported normally now
