"""What a walker or chain with far-below-median acceptance means, read from its draws.

The acceptance rule (:func:`chainyard.diagnostics.acceptance_report`) flags walkers or chains
whose acceptance is far below their replica's median. That alone says nothing about *why*,
and the reasons call for different words (rules chosen here, documented in docs/verdict.md):

* **stuck**: it never moved, or its own spread is less than half the median spread of its
  replica's walkers (median over parameters): it sits where it is and does not sample the
  target. Fails the mixing question.
* **minority region** (ensembles only): it moves as much as the others but its acceptance is
  low, as for walkers holding a mode or region that most of the ensemble is not in (the
  ensemble's proposals for it use partners from elsewhere and are rejected). The run's
  walkers hold separate regions in shares nobody controls. Fails the mixing question.
* **slow chain** (independent chains: Metropolis-Hastings, user kernels): a chain is a valid
  sampler on its own, only slower (e.g. a per-chain adapted proposal that froze larger than
  the others'); it is judged by its own bulk ESS (Vehtari et al. 2021, every parameter): if
  that reaches its share of the run's bulk-ESS target (``min_ess_bulk / chains``, at least
  :data:`MIN_OWN_ESS`) it is reported and the run is not failed; otherwise it counts as
  stuck.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from chainyard.diagnostics import ess_bulk

#: Fewest own bulk ESS (every parameter) a slow chain must show to count as moving.
MIN_OWN_ESS = 10.0

#: A flagged walker whose own spread is below this share of the replica's median is stuck.
SPREAD_RATIO = 0.5


@dataclass
class LowAcceptance:
    """Flagged walkers/chains per replica, by finding (module docstring)."""

    stuck: dict[int, list[int]] = field(default_factory=dict)
    minority: dict[int, list[int]] = field(default_factory=dict)
    slow: dict[int, list[dict[str, Any]]] = field(default_factory=dict)


def classify(
    stores: Sequence[Any],
    steps: int,
    acceptance: Sequence[dict[str, Any]],
    kind: str,
    min_ess_bulk: float | None,
) -> LowAcceptance:
    """Sort each replica's flagged walkers/chains into stuck, minority region or slow chain.

    Parameters
    ----------
    stores : sequence of Store (or in-memory replicas)
        The replicas, read over their first ``steps`` steps, one parameter column at a time.
    steps : int
    acceptance : sequence of dict
        Per replica, :meth:`AcceptanceReport.to_dict` with ``replica`` (same order as stores).
    kind : str
        Sampler kind: ``ensemble`` (walkers) or independent chains.
    min_ess_bulk : float or None
        The run's bulk-ESS target (for the slow-chain share).

    Returns
    -------
    LowAcceptance
    """
    out = LowAcceptance()
    chains = sum(s.walkers for s in stores)
    share = max(MIN_OWN_ESS, (min_ess_bulk or 0.0) / max(chains, 1))
    for s, rep in zip(stores, acceptance, strict=True):
        flagged = [int(w) for w in rep["stuck_walkers"]]
        if not flagged:
            continue
        r = int(rep["replica"])
        per_walker = rep["per_walker"]
        ratios = np.empty((len(s.param_names), len(flagged)))
        own_ess = np.full((len(s.param_names), len(flagged)), np.inf)
        for j in range(len(s.param_names)):
            col = np.asarray(s.column(j, 0, steps))  # (steps, walkers)
            sd = col.std(axis=0)
            med = float(np.median(sd))
            ratios[j] = sd[flagged] / med if med > 0 else 0.0
            if kind != "ensemble":
                for i, w in enumerate(flagged):
                    if per_walker[w] > 0 and sd[w] > 0:
                        own_ess[j, i] = ess_bulk(col[:, w][None, :])
                    else:
                        own_ess[j, i] = 0.0
        spread = np.median(ratios, axis=0)
        for i, w in enumerate(flagged):
            moved = per_walker[w] > 0 and spread[i] >= SPREAD_RATIO
            if kind == "ensemble":
                target = out.minority if moved else out.stuck
                target.setdefault(r, []).append(w)
                continue
            ess = float(np.min(own_ess[:, i]))
            if per_walker[w] > 0 and np.isfinite(ess) and ess >= share:
                out.slow.setdefault(r, []).append(
                    {
                        "chain": w,
                        "acceptance": per_walker[w],
                        "own_ess_bulk": ess,
                        "required": share,
                    }
                )
            else:
                out.stuck.setdefault(r, []).append(w)
    return out
