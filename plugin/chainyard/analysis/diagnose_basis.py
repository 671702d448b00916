"""What the diagnostics compare, per sampler kind.

The basis of R-hat and ESS depends on the sampler kind (:data:`BASIS`, read from the stores
by :func:`sampler_kind`); :data:`WHAT_IS_COMPARED` and :func:`_what_each` are the texts
every diagnostics record carries; :func:`accept_reject_summary` is the acceptance rate an
accept-reject run reports beside them.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from chainyard.decisions.targets import WHAT_EACH_CHECK_COMPARES
from chainyard.diagnostics.acceptance import accept_reject_rate
from chainyard.errors import ChainyardError

__all__ = ["BASIS", "WHAT_IS_COMPARED", "accept_reject_summary", "sampler_kind"]

WHAT_IS_COMPARED = (
    "nested R-hat: replicas as superchains, walkers as chains (replica-mean spread vs posterior "
    "sd). R-hat: one chain per replica (its walker-mean trace). ESS/MCSE: every walker of every "
    "replica as a chain. tau: per replica, walkers averaged; mean over replicas checked, largest "
    "reported (tau_max); growth: whole "
    "run vs its first half. mESS: walker-mean traces of all replicas."
)


#: what R-hat and ESS treat as chains, per sampler kind
BASIS = {
    "ensemble": (
        "ensemble: R-hat on one walker-mean trace per replica; ESS/MCSE with every walker "
        "as a chain"
    ),
    "metropolis_hastings": (
        "independent chains: R-hat and ESS/MCSE with every chain of every replica as a chain"
    ),
    "kernel": "independent chains: R-hat and ESS/MCSE with every chain of every replica as a chain",
    "accept_reject": (
        "independent draws: ESS = number of draws (tau = 1), MCSE = sd / sqrt(draws); R-hat "
        "with every chain as a chain"
    ),
}


def sampler_kind(stores: Sequence[Any]) -> str:
    """The sampler kind of a run's stores (``ensemble`` for stores that do not record one)."""
    attrs = getattr(stores[0], "attrs", None) or {}
    sampler = (attrs.get("config") or {}).get("sampler") or {}
    kind = attrs.get("sampler_kind") or sampler.get("kind") or "ensemble"
    return kind if kind in BASIS else "ensemble"


def _move_kinds(stores: Sequence[Any], kind: str) -> list[str] | None:
    if kind != "ensemble":
        return [kind]
    try:
        return [m.kind for m in stores[0].config.sampler.moves]
    except (AttributeError, ChainyardError):  # in-memory replicas, or no readable config
        return None


def _what_each(replicas: int) -> dict[str, str]:
    """What each check compares; with one replica, what nested R-hat could not compare."""
    out = dict(WHAT_EACH_CHECK_COMPARES)
    if replicas == 1:
        out["rhat_nested"] = (
            "mixing: one replica, so nested R-hat compares only the run's two halves (a drift "
            "check; no independent starts compared); run 4 replicas"
        )
    return out


def accept_reject_summary(stores: Sequence[Any], steps: int) -> dict[str, Any] | None:
    """Acceptance rate with its binomial SE over the replicas' first ``steps`` draws (None
    when the stores hold no proposal counts, e.g. draws held in memory)."""
    from chainyard.engine.accept_reject import PROPOSALS_BLOB

    name = f"blob/{PROPOSALS_BLOB}"
    if not all(name in getattr(s, "array_names", lambda: ())() for s in stores):
        return None
    counts = np.concatenate([s.read_rows(name, 0, steps) for s in stores], axis=1)
    sampler = (stores[0].attrs.get("config") or {}).get("sampler") or {}
    bound = sampler.get("log_bound")
    return accept_reject_rate(counts, float(bound) if bound is not None else None)
