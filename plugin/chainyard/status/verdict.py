"""The interim verdict of a run from its committed steps, cheap enough to refresh often.

Burn-in and thinning are decided when the run is done; until then the second half of the
committed steps stands in for the draws after burn-in (the "discard the first half" rule of
Gelman et al., *Bayesian Data Analysis*, 3rd ed., 2013, sec. 11.4). At most
:data:`MAX_ROWS` of those steps are read (every k-th, evenly spaced), from every replica's
store up to the step all of them have committed, and judged by
:func:`chainyard.analysis.diagnose.diagnose_arrays` against the run's targets: the same checks
as the final verdict, on fewer draws. Reads go through the store's guarded reader (committed
rows only, sizes checked); nothing is written and no lock is taken, so samplers never wait.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

__all__ = ["MAX_ROWS", "MIN_STEPS", "VerdictCache", "final_verdict", "interim_verdict"]

#: steps read per replica at most (memory: MAX_ROWS x walkers x params x replicas float64)
MAX_ROWS = 500
#: fewer committed steps than this (per replica) give no verdict yet
MIN_STEPS = 100
#: a diagnostics record bigger than this is not read (it is a few kB per parameter)
_MAX_RECORD_BYTES = 32 * 1024 * 1024


def interim_verdict(stores: Sequence[Path], upto: int | None = None) -> dict[str, Any] | None:
    """The verdict on the second half of the first ``upto`` committed steps of every replica.

    Parameters
    ----------
    stores : sequence of Path
        The run's replica stores (those that exist so far).
    upto : int, optional
        Judge the first ``upto`` steps (default: all steps every store has committed).

    Returns
    -------
    dict or None
        ``ok`` (bool), ``line`` (the verdict's first line), ``max_rhat`` (largest nested
        R-hat), ``min_ess_bulk`` and ``min_ess_tail``, ``from_step``, ``to_step``, ``every``
        (the rows read), ``replicas``; None when fewer than :data:`MIN_STEPS` steps are
        committed or the stores cannot be read.
    """
    import numpy as np

    from chainyard.errors import ChainyardError
    from chainyard.store import Store

    opened = []
    try:
        for path in stores:
            try:
                opened.append(Store.open(path))
            except (ChainyardError, OSError):
                continue
        if not opened:
            return None
        done = min(s.steps_done for s in opened)
        stop = done if upto is None else min(upto, done)
        if stop < MIN_STEPS:
            return None
        start = stop // 2
        every = max(1, math.ceil((stop - start) / MAX_ROWS))
        first = opened[0]
        try:
            draws = np.stack([s.read_rows("position", start, stop, every) for s in opened])
            config = first.config
            kind = str(getattr(config.sampler, "kind", "ensemble"))
            from chainyard.analysis.diagnose import diagnose_arrays

            result = diagnose_arrays(draws, config.targets, names=first.param_names, kind=kind)
        except (ChainyardError, OSError, ValueError, FloatingPointError):
            return None
    finally:
        for s in opened:
            s.close()
    return _summary(result, start, stop, every, len(opened))


def final_verdict(record: Path) -> dict[str, Any] | None:
    """The verdict of a done run from its diagnostics record (``RESULTS/RUN/diagnostics.json``).

    Same keys as :func:`interim_verdict` plus ``final: true``; ``from_step`` is None (the
    record's draws follow the run's burn-in and thinning decisions) and ``to_step`` is the
    number of steps judged. None if the record is missing, too big or not one.
    """
    import json

    try:
        with record.open("rb") as f:
            raw = f.read(_MAX_RECORD_BYTES + 1)
        data = json.loads(raw) if len(raw) <= _MAX_RECORD_BYTES else None
    except (OSError, ValueError):
        return None
    if not isinstance(data, dict) or data.get("kind") != "chainyard.diagnostics":
        return None
    verdict = data.get("verdict")
    if not isinstance(verdict, dict) or not isinstance(data.get("params"), dict):
        return None
    steps = data.get("steps")
    replicas = data.get("replicas")
    try:
        out = _summary(
            data,
            None,
            int(steps) if isinstance(steps, int) else None,
            1,
            int(replicas) if isinstance(replicas, int) else len(replicas or []),
        )
    except (TypeError, ValueError, AttributeError):
        return None
    out["final"] = True
    return out


def _finite(values: list[Any]) -> list[float]:
    return [float(v) for v in values if isinstance(v, int | float) and math.isfinite(v)]


def _summary(
    result: dict[str, Any], start: int | None, stop: int | None, every: int, n: int
) -> dict[str, Any]:
    """The small JSON verdict of ``status`` from :func:`diagnose_arrays`' result."""
    verdict = result["verdict"]
    params = {k: p for k, p in result.get("params", {}).items() if isinstance(p, dict)}
    rhats = _finite([p.get("rhat_nested", p.get("rhat")) for p in params.values()])
    bulk = _finite([p.get("ess_bulk") for p in params.values()])
    tail = _finite([p.get("ess_tail") for p in params.values()])
    lines = verdict.get("lines") or [""]
    goals = result.get("targets") or {}
    return {
        "ok": bool(verdict.get("ok")),
        "line": str(lines[0]),
        "max_rhat": round(max(rhats), 4) if rhats else None,
        "min_ess_bulk": round(min(bulk), 1) if bulk else None,
        "min_ess_tail": round(min(tail), 1) if tail else None,
        "from_step": start,
        "to_step": stop,
        "every": every,
        "replicas": n,
        "targets": {k: goals.get(k) for k in ("max_nested_rhat", "min_ess_bulk")},
        "final": False,
    }


class VerdictCache:
    """Interim verdicts kept between refreshes: recomputed only when the committed steps grow.

    Also keeps a short history per run (verdicts at earlier step counts) for the page's plot.
    """

    def __init__(self) -> None:
        self._last: dict[str, tuple[tuple[str, ...], int, dict[str, Any] | None]] = {}
        self.history: dict[str, dict[int, dict[str, Any]]] = {}

    def get(
        self, run: str, stores: Sequence[Path], steps: int, *, with_history: bool = False
    ) -> dict[str, Any] | None:
        """The run's verdict on its first ``steps`` steps (committed by every replica), from
        the cache when nothing was committed since.

        Parameters
        ----------
        with_history : bool
            On first sight of a run, also judge it at a quarter, half and three quarters of
            its steps (the first points of the page's plot).
        """
        key = tuple(sorted(str(p) for p in stores))
        last = self._last.get(run)
        if last is not None and last[0] == key and last[1] == steps:
            return last[2]
        verdict = interim_verdict(stores, steps)  # the steps the row shows, not later ones
        self._last[run] = (key, steps, verdict)
        points = self.history.setdefault(run, {})
        if verdict is not None:
            if with_history and not points:
                for frac in (0.25, 0.5, 0.75):
                    early = interim_verdict(stores, int(verdict["to_step"] * frac))
                    if early is not None:
                        points[early["to_step"]] = early
            points[verdict["to_step"]] = verdict
        return verdict
