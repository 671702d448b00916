"""Convergence diagnostics across a run's replicas, with a verdict in three questions.

What is compared (documented in every diagnostics record, ``what_each_check_compares``):

* **mixing**: nested R-hat (Margossian et al. 2024, Bayesian Analysis) with the replicas as
  superchains and the walkers of a replica as its chains: the spread of the replica means
  against the posterior sd (derivation for dependent walkers in
  :mod:`chainyard.diagnostics.nested`). The classic rank-normalised split R-hat (Vehtari et
  al. 2021, Bayesian Analysis 16(2)) on one walker-mean trace per replica is reported beside
  it (gating only if ``max_rhat`` is set). With one replica both compare the run's halves.
* **tau**: autocorrelation time per replica with walkers averaged (Foreman-Mackey et al.
  2013); the mean over replicas is checked (largest reported as ``tau_max``): steps per tau
  against the 50-tau rule, and its growth, tau of the whole run over tau of its first half.
* **precision**: ESS and MCSE (bulk, tail, mean, sd, quantiles; Vehtari et al. 2021) treat
  every walker of every replica as a chain, the usual practice for ensembles; ``ess_tau``
  (draws / tau, Sokal 1997) is reported beside them. Multivariate ESS (Vats, Flegal and
  Jones 2019, Biometrika 106(2)) on the walker-mean traces of all replicas.

The basis depends on the sampler kind (recorded as ``basis`` in the result): the walkers of
an ensemble are not independent, so R-hat uses one walker-mean trace per replica as above;
the chains of Metropolis-Hastings and user kernels are independent chains, so R-hat (split,
rank-normalised) uses every chain of every replica directly; accept-reject draws are
independent, so ESS is the number of draws (tau 1) and its acceptance rate with binomial
standard error is reported (``accept_reject``).

Memory is bounded by the size of one parameter *column* (that parameter for every walker of
every replica), not by the store: see :func:`diagnose`. :func:`diagnose_arrays` runs the same
code on draws held in memory.

This module joins the parts: the per-parameter numbers come from
:mod:`chainyard.analysis.diagnose_compute`, the basis per sampler kind and the texts of what
is compared from :mod:`chainyard.analysis.diagnose_basis`, the verdict from
:func:`chainyard.decisions.assess`; :mod:`chainyard.analysis.diagnose_text` renders the
result and :mod:`chainyard.analysis.diagnose_reference` compares it with a reference run.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from chainyard.analysis.diagnose_basis import (
    BASIS,
    WHAT_IS_COMPARED,
    _move_kinds,
    _what_each,
    accept_reject_summary,
    sampler_kind,
)
from chainyard.analysis.diagnose_compute import (
    FloatArray,
    _finite,
    _param_diagnostics,
    read_column,
)
from chainyard.analysis.diagnose_text import format_table
from chainyard.analysis.low_acceptance import classify as classify_low_acceptance
from chainyard.config import TargetsSpec
from chainyard.decisions import assess
from chainyard.diagnostics import acceptance_report, min_ess, multivariate_ess
from chainyard.diagnostics._validation import MIN_DRAWS
from chainyard.diagnostics.acceptance import acceptance_band
from chainyard.errors import StoreError
from chainyard.store import Store

__all__ = [
    "WHAT_IS_COMPARED",
    "ArrayReplica",
    "diagnose",
    "diagnose_arrays",
    "format_table",
    "read_column",
]


class ArrayReplica:
    """One replica's draws held in memory, read through the same interface as a store.

    Used by :func:`diagnose_arrays` (simulation studies, tests) so that in-memory draws go
    through exactly the code path of :func:`diagnose`.

    Parameters
    ----------
    draws : ndarray, shape (steps, walkers, params)
    accepted : ndarray of bool, shape (steps, walkers), optional
        Acceptance flags; all True if not given (no acceptance information).
    names : sequence of str
    replica : int
    """

    chunk_steps = 1 << 30  # one "chunk": the array is already in memory

    def __init__(
        self,
        draws: FloatArray,
        accepted: npt.NDArray[np.bool_] | None,
        names: Sequence[str],
        replica: int,
    ) -> None:
        self._draws = draws
        self._accepted = accepted
        self.param_names = tuple(names)
        self.replica = replica
        self.steps_done = int(draws.shape[0])
        self.walkers = int(draws.shape[1])

    def column(self, param: int, start: int = 0, stop: int | None = None) -> FloatArray:
        """One parameter, shape (steps, walkers)."""
        return self._draws[start:stop, :, param]

    def accepted(self, start: int = 0, stop: int | None = None) -> npt.NDArray[np.bool_]:
        """Acceptance flags, shape (steps, walkers)."""
        if self._accepted is None:
            stop = self.steps_done if stop is None else stop
            return np.ones((stop - start, self.walkers), dtype=bool)
        return self._accepted[start:stop]


def diagnose_arrays(
    draws: FloatArray,
    targets: TargetsSpec | None = None,
    *,
    accepted: npt.NDArray[np.bool_] | None = None,
    names: Sequence[str] | None = None,
    move_kinds: Sequence[str] | None = None,
    kind: str = "ensemble",
) -> dict[str, Any]:
    """:func:`diagnose` on draws held in memory (same code, same result dict).

    Parameters
    ----------
    draws : ndarray, shape (replicas, steps, walkers, params)
        float64 draws of every replica (after burn-in).
    targets : TargetsSpec, optional
        Defaults to ``TargetsSpec()`` (the config defaults).
    accepted : ndarray of bool, shape (replicas, steps, walkers), optional
        Acceptance flags; if not given the acceptance checks see every proposal accepted.
    names : sequence of str, optional
        Parameter names (default ``x0, x1, ...``).
    move_kinds : sequence of str, optional
        The run's move kinds for the acceptance band (default: ensemble moves).
    kind : str
        Sampler kind, for the basis of R-hat and ESS (:data:`BASIS`).

    Returns
    -------
    dict
        As :func:`diagnose`.
    """
    draws = np.asarray(draws, dtype=np.float64)
    if draws.ndim != 4:
        raise ValueError(
            f"draws must have shape (replicas, steps, walkers, params), got {draws.shape}"
        )
    n_params = draws.shape[3]
    names = tuple(names) if names is not None else tuple(f"x{j}" for j in range(n_params))
    if len(names) != n_params:
        raise ValueError(f"{len(names)} names given for {n_params} parameters")
    if accepted is not None:
        accepted = np.asarray(accepted, dtype=bool)
        if accepted.shape != draws.shape[:3]:
            raise ValueError(f"accepted must have shape {draws.shape[:3]}, got {accepted.shape}")
    replicas = [
        ArrayReplica(draws[r], None if accepted is None else accepted[r], names, r)
        for r in range(draws.shape[0])
    ]
    return diagnose(
        replicas,  # type: ignore[arg-type]
        targets or TargetsSpec(),
        move_kinds=move_kinds,
        kind=kind,
    )


#: Fewest steps (after burn-in) diagnose accepts: split chains need two halves of 2 draws.
MIN_STEPS = MIN_DRAWS


def _kind_targets(targets: Any, kind: str) -> Any:
    """The targets a kind's runs are judged by: accept-reject draws are exact and independent
    (tau is 1 by construction, nothing is estimated), so the two tau checks do not apply."""
    if kind == "accept_reject":
        return dataclasses.replace(targets, min_steps_per_tau=None, max_tau_growth=None)
    return targets


def diagnose(
    stores: Sequence[Store],
    targets: TargetsSpec | None = None,
    *,
    move_kinds: Sequence[str] | None = None,
    kind: str | None = None,
) -> dict[str, Any]:
    """Diagnostics per parameter, acceptance per replica, mESS, and the verdict.

    Bounded memory: one parameter at a time, read from the stores a few chunks at a time,
    into two reused buffers of one *column* each (one parameter of every walker of every
    replica: ``steps x walkers x replicas`` float64), plus an index array of one column
    during each rank normalisation, so the peak is about three columns above the process's
    baseline, whatever the number of parameters. Held across parameters: the walker-mean
    traces of all parameters (the mESS input, ``raw size / walkers``).

    Parameters
    ----------
    stores : sequence of Store
        The replicas of one run (after burn-in), same parameters and walkers.
    targets : TargetsSpec, optional
        Targets for the verdict (default: the first store's config targets).
    move_kinds : sequence of str, optional
        Move kinds for the acceptance band (default: from the first store's config).
    kind : str, optional
        Sampler kind (default: the stores' recorded kind); sets the basis (:data:`BASIS`).

    Returns
    -------
    dict
        JSON-ready: ``params``, ``acceptance``, ``multivariate``, ``verdict`` (``ok``,
        ``checks`` per question, ``more_steps``, per-parameter ``checks``/``failures``),
        ``steps``, ``walkers``, ``replicas``, ``what_is_compared``, ``what_each_check_compares``.

    Raises
    ------
    StoreError
        If the shortest replica has fewer than :data:`MIN_STEPS` steps.
    """
    targets = targets or stores[0].config.targets
    kind = kind or sampler_kind(stores)
    steps = min(s.steps_done for s in stores)
    if steps < MIN_STEPS:
        raise StoreError(
            f"diagnose needs at least {MIN_STEPS} steps per replica after burn-in (split-chain "
            f"R-hat and ESS use two halves of at least 2 steps); the shortest replica has {steps}"
        )
    names = stores[0].param_names
    chains = sum(s.walkers for s in stores)
    means = np.empty((len(stores), steps, len(names)))  # walker-mean traces, for mESS
    x = np.empty((chains, steps))
    work = np.empty(x.size)
    params = {}
    min_spt = targets.min_steps_per_tau or 50.0
    for j, name in enumerate(names):
        params[name] = _param_diagnostics(stores, j, steps, min_spt, x, work, means[:, :, j], kind)
    del x, work
    kinds = list(move_kinds) if move_kinds is not None else _move_kinds(stores, kind)
    band = acceptance_band(kinds, len(names))
    acceptance = []
    for s in stores:
        rep = acceptance_report(s.accepted(0, steps), band)
        acceptance.append({"replica": s.replica, **rep.to_dict()})
        acceptance[-1]["messages"] = [f"replica {s.replica}: {m}" for m in rep.messages]
    try:
        mess = float(multivariate_ess(means))
    except ValueError:
        mess = float("nan")
    if kind == "accept_reject":
        mess = float(steps * chains)  # independent draws
    del means
    multivariate = {
        "ess": _finite(mess),
        "min_ess_required": (
            int(min_ess(len(names), eps=targets.relative_precision))
            if targets.relative_precision
            else None
        ),
    }
    low = classify_low_acceptance(stores, steps, acceptance, kind, targets.min_ess_bulk)
    keys = ("rhat_nested", "rhat", "rhat_tail", "ess_bulk", "ess_tail", "steps_per_tau")
    keys += ("tau_growth", "tau")
    per_param = {
        n: {k: (np.nan if params[n][k] is None else params[n][k]) for k in keys} for n in names
    }
    for n in names:  # absent where not defined (see target_checks.ONLY_WHEN_COMPUTED)
        per_param[n]["tail_move_ratio"] = params[n].get("tail_move_ratio")
    verdict = assess(
        per_param,
        _kind_targets(targets.to_targets(), kind),
        multivariate_ess=multivariate["ess"],
        n_params=len(names),
        steps=steps,
        stuck_walkers=low.stuck,
        minority_walkers=low.minority,
        slow_chains=low.slow,
        replicas=len(stores),
    )
    bad_acceptance = [a for a in acceptance if a["messages"]]
    extra: dict[str, Any] = {}
    if kind == "accept_reject":
        extra["accept_reject"] = accept_reject_summary(stores, steps)
    return {
        "sampler_kind": kind,
        "basis": BASIS[kind],
        **extra,
        "replicas": len(stores),
        "steps": steps,
        "walkers": stores[0].walkers,
        "params": params,
        "acceptance": acceptance,
        "acceptance_warnings": [m for a in bad_acceptance for m in a["messages"]],
        "multivariate": multivariate,
        "verdict": verdict.to_dict(),
        "more_steps": verdict.more_steps,
        "targets": targets.model_dump(mode="json"),
        "what_is_compared": WHAT_IS_COMPARED,
        "what_each_check_compares": _what_each(len(stores)),
    }
