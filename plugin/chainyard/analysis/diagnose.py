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
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from chainyard.analysis.low_acceptance import classify as classify_low_acceptance
from chainyard.analysis.signals import score_growth, tail_rhat
from chainyard.config import TargetsSpec
from chainyard.decisions import assess
from chainyard.decisions.targets import WHAT_EACH_CHECK_COMPARES
from chainyard.diagnostics import (
    acceptance_report,
    integrated_time,
    integrated_time_report,
    min_ess,
    multivariate_ess,
    rhat,
    rhat_bulk,
    rhat_folded,
)
from chainyard.diagnostics._validation import MIN_DRAWS
from chainyard.diagnostics.acceptance import accept_reject_rate, acceptance_band
from chainyard.diagnostics.nested import nested_rhat_folded_inplace, nested_rhat_of_scores
from chainyard.diagnostics.pooled import pooled_summary
from chainyard.display import accept_reject_line
from chainyard.errors import ChainyardError, StoreError
from chainyard.store import Store

__all__ = [
    "WHAT_IS_COMPARED",
    "ArrayReplica",
    "diagnose",
    "diagnose_arrays",
    "format_table",
    "read_column",
]

FloatArray = npt.NDArray[np.float64]

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


def _finite(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


#: Bytes of stored rows (all walkers and parameters) spanned by one read: a whole number of
#: stored chunks, at least one. zarr decodes whole chunks, so this bounds its temporaries.
READ_BYTES = 1 << 23


def read_column(
    stores: Sequence[Store], j: int, steps: int, out: FloatArray, walker_means: FloatArray
) -> None:
    """Read parameter ``j`` of every replica into ``out``, streaming over stored chunks.

    ``out[offset_r + w, t]`` is walker ``w`` of replica ``r`` at step ``t`` (every walker
    of every replica as a chain, C-ordered: rows are contiguous), and
    ``walker_means[r, t]`` the walker-mean trace of replica ``r`` (the R-hat chains and the
    mESS input). The store is read a few stored chunks at a time (:data:`READ_BYTES`), so
    the only temporaries are those chunks.

    Parameters
    ----------
    stores : sequence of Store
    j : int
        Parameter index.
    steps : int
        Steps read from each replica (from the first).
    out : ndarray, shape (sum of walkers, steps)
        Overwritten.
    walker_means : ndarray, shape (replicas, steps)
        Overwritten.

    Raises
    ------
    StoreError
        If a replica's draws contain NaN or infinite values (never written by chainyard).
    """
    row = 0
    for r, s in enumerate(stores):
        walkers = s.walkers
        rows = out[row : row + walkers]
        chunk = s.chunk_steps
        row_bytes = 8 * walkers * len(s.param_names)
        per_call = chunk * max(1, READ_BYTES // (row_bytes * chunk))
        for a in range(0, steps, per_call):
            b = min(steps, a + per_call)
            block = s.column(j, a, b)  # (b - a, walkers)
            if not np.isfinite(block).all():
                raise StoreError(
                    f"replica {getattr(s, 'replica', r)}: parameter {s.param_names[j]} holds NaN "
                    f"or infinite draws in steps {a}-{b - 1}; chainyard never stores them: the "
                    "store is damaged"
                )
            rows[:, a:b] = block.T
            walker_means[r, a:b] = block.mean(axis=1)
        row += walkers


def _tau_growth(
    x: FloatArray, stores: Sequence[Any], steps: int, whole: Sequence[float]
) -> float | None:
    """tau of the whole run / tau of its first half, both averaged over replicas.

    ``whole`` holds the replicas' whole-run estimates (already computed); only the first
    halves are transformed here.
    """
    half = steps // 2
    if half < MIN_DRAWS:
        return None
    first = 0.0
    row = 0
    for s in stores:
        first += integrated_time(x[row : row + s.walkers, :half])
        row += s.walkers
    total = float(np.sum(whole))
    if not (np.isfinite(total) and np.isfinite(first)) or first <= 0:
        return None
    return float(total / first)


def _nested_groups(stores: Sequence[Any]) -> int | None:
    """Superchains for nested R-hat: the replicas (equal walkers), or 1 (halves of the run)."""
    if len({s.walkers for s in stores}) != 1:
        return None
    return len(stores)


def _param_diagnostics(
    stores: Sequence[Any],
    j: int,
    steps: int,
    min_steps_per_tau: float,
    x: FloatArray,
    work: FloatArray,
    walker_means: FloatArray,
    kind: str = "ensemble",
) -> dict[str, Any]:
    """Diagnostics of parameter ``j``; ``x`` and ``work`` are reused buffers (one column each).

    ``kind`` sets the basis (:data:`BASIS`): for an ensemble R-hat uses the walker-mean
    traces, for independent chains every chain.

    Memory: ``x`` (the draws of all walkers of all replicas), ``work`` and, during each rank
    normalisation, one index array of the same length: three columns, plus blocks of a few
    MiB (see :mod:`chainyard.diagnostics.pooled`). The column is read twice: the folded
    nested R-hat needs the raw draws after the pooled summary has overwritten them.
    """
    read_column(stores, j, steps, x, walker_means)
    # independent chains are chains for R-hat directly: x, before it is overwritten below
    replica_chains = np.ascontiguousarray(walker_means) if kind == "ensemble" else x
    rhats = (
        _finite(rhat(replica_chains)),
        _finite(rhat_bulk(replica_chains)),
        _finite(rhat_folded(replica_chains)),
    )
    del replica_chains
    reports = []
    row = 0
    for s in stores:  # tau per replica, walkers averaged; rows of x are that replica's walkers
        reports.append(
            integrated_time_report(x[row : row + s.walkers], min_steps_per_tau=min_steps_per_tau)
        )
        row += s.walkers
    # the verdict's tau: mean of the replicas' estimates (each averages the ACF over its
    # walkers, Foreman-Mackey et al. 2013); 4 replicas give 4 times the walkers of one
    # estimate, so the mean is the less noisy estimate of the same tau; the largest is reported
    tau = float(np.mean([r.tau for r in reports]))
    tau_max = max(r.tau for r in reports)
    growth_raw = _tau_growth(x, stores, steps, [r.tau for r in reports])
    draws_total = x.size
    pooled = pooled_summary(x, work, overwrite=True)  # x holds normal scores afterwards
    groups = _nested_groups(stores)
    nested = None
    tails = None
    # on the normal scores in x (its middle column set to 0): robust to heavy tails
    growth = score_growth(x, stores) if np.isfinite(pooled["ess_bulk"]) else growth_raw
    if groups is not None and np.isfinite(pooled["ess_bulk"]):
        bulk = nested_rhat_of_scores(x, groups)  # x: normal scores of the split chains
        read_column(stores, j, steps, x, walker_means)
        tails = tail_rhat(x, stores, pooled["q05"], pooled["q95"])
        folded = nested_rhat_folded_inplace(x, work, groups)
        nested = _finite(max(bulk, folded))
    out = {
        "mean": pooled["mean"],
        "sd": pooled["sd"],
        "q05": pooled["q05"],
        "q50": pooled["q50"],
        "q95": pooled["q95"],
        "rhat_nested": nested,
        "rhat": rhats[0],
        "rhat_bulk": rhats[1],
        "rhat_folded": rhats[2],
        "ess_bulk": _finite(pooled["ess_bulk"]),
        "ess_tail": _finite(pooled["ess_tail"]),
        "ess_tau": float(draws_total / tau) if tau > 0 else None,
        "mcse_mean": _finite(pooled["mcse_mean"]),
        "mcse_sd": _finite(pooled["mcse_sd"]),
        "mcse_q05": _finite(pooled["mcse_q05"]),
        "mcse_q95": _finite(pooled["mcse_q95"]),
        "tau": _finite(tau),
        "tau_max": _finite(tau_max),
        "tau_per_replica": [_finite(r.tau) for r in reports],
        "steps_per_tau": float(steps / tau) if tau > 0 else None,
        "tau_growth": growth,
        "tau_growth_raw": growth_raw,
        "rhat_tail": tails,
        "tau_reliable": all(r.reliable for r in reports),
        "tau_messages": [r.message for r in reports if r.message],
    }
    if kind == "accept_reject":  # independent draws by construction
        n = float(draws_total)
        sd = pooled["sd"]
        out.update(
            ess_bulk=n,
            ess_tail=n,
            ess_tau=n,
            tau=1.0,
            tau_max=1.0,
            tau_per_replica=[1.0] * len(stores),
            steps_per_tau=float(steps),
            tau_growth=1.0,
            tau_growth_raw=1.0,
            tau_reliable=True,
            tau_messages=[],
            mcse_mean=_finite(sd / np.sqrt(n)) if sd is not None else None,
        )
    return out


#: Fewest steps (after burn-in) diagnose accepts: split chains need two halves of 2 draws.
MIN_STEPS = MIN_DRAWS


def _move_kinds(stores: Sequence[Any], kind: str) -> list[str] | None:
    if kind != "ensemble":
        return [kind]
    try:
        return [m.kind for m in stores[0].config.sampler.moves]
    except (AttributeError, ChainyardError):  # in-memory replicas, or no readable config
        return None


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
    verdict = assess(
        {n: {k: (np.nan if params[n][k] is None else params[n][k]) for k in keys} for n in names},
        targets.to_targets(),
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


def _what_each(replicas: int) -> dict[str, str]:
    """What each check compares; with one replica, what nested R-hat could not compare."""
    out = dict(WHAT_EACH_CHECK_COMPARES)
    if replicas == 1:
        out["rhat_nested"] = (
            "mixing: one replica, so nested R-hat compares only the run's two halves (a drift "
            "check; no independent starts compared); run 4 replicas"
        )
    return out


def compare_with_reference(
    stores: Sequence[Store],
    result: dict[str, Any],
    reference: Sequence[Store],
    label: str,
) -> dict[str, Any]:
    """Two-sample tests of every parameter of ``stores`` against a reference run.

    Each side's draws (all walkers or chains of all replicas, as given: after burn-in) are
    compared per parameter by :func:`chainyard.diagnostics.twosample.compare_samples`, with
    the bulk ESS of each side as its effective size (the reference's from its own
    diagnostics, so an accept-reject reference counts every draw).

    Memory: one parameter column of each run at a time.
    """
    from chainyard.diagnostics.twosample import compare_samples

    names = stores[0].param_names
    missing = [n for n in names if n not in reference[0].param_names]
    if missing:
        raise StoreError(
            f"{label}: the reference run has no parameter {missing[0]!r} (it has "
            f"{', '.join(reference[0].param_names)})"
        )
    ref_result = diagnose(reference, result_targets(result))
    out: dict[str, Any] = {
        "reference": label,
        "reference_kind": ref_result["sampler_kind"],
        "method": "two-sample Kolmogorov-Smirnov with effective sizes (ESS bulk), "
        "energy distance beside it (Szekely and Rizzo 2013)",
        "params": {},
    }
    for name in names:
        a = _all_draws(stores, stores[0].param_names.index(name), result["steps"])
        j = reference[0].param_names.index(name)
        b = _all_draws(reference, j, ref_result["steps"])
        out["params"][name] = compare_samples(
            a, b, result["params"][name]["ess_bulk"], ref_result["params"][name]["ess_bulk"]
        )
    return out


def result_targets(result: dict[str, Any]) -> TargetsSpec:
    """The targets a diagnostics result was judged by."""
    return TargetsSpec.model_validate(result["targets"])


def _all_draws(stores: Sequence[Store], j: int, steps: int) -> FloatArray:
    """Parameter ``j`` of every walker or chain of every replica, first ``steps`` rows."""
    chains = sum(s.walkers for s in stores)
    out = np.empty((chains, steps))
    read_column(stores, j, steps, out, np.empty((len(stores), steps)))
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


def _num(value: Any, fmt: str) -> str:
    """``value`` formatted, or a dash right-aligned to the same width when it is missing."""
    if value is None:
        width = "".join(ch for ch in fmt.split(".")[0].split(",")[0] if ch.isdigit())
        return "-".rjust(int(width) if width else 1)
    return format(value, fmt)


def _questions(check: dict[str, Any]) -> str:
    """``ok`` or the failed questions of one parameter, e.g. ``FAIL tau,precision``."""
    failed = [q for q, ok in check.get("checks", {}).items() if not ok]
    if check["ok"]:
        return "ok"
    return "FAIL " + ",".join(failed) if failed else "FAIL"


def format_table(result: dict[str, Any], title: str = "", selection: str | None = None) -> str:
    """A plain-text table of the diagnostics with the verdict (for terminals and logs).

    ``selection`` says which draws were diagnosed (default "after burn-in", as the
    workflow's selection always is).

    Columns: nested R-hat (mixing), classic R-hat (reported), tau growth and steps per tau
    (tau), bulk/tail ESS (precision); under the table the verdict, the steps still needed,
    and one line per check saying what it compares.
    """
    head = (
        f"{'parameter':<16}{'mean':>11}{'sd':>10}{'MCSE':>9}{'nR-hat':>8}{'R-hat':>7}"
        f"{'ESS bulk':>9}{'ESS tail':>9}{'tau':>8}{'steps/tau':>10}{'growth':>7}"
        f"{'steps needed':>13}  check"
    )
    lines = []
    if title:
        lines.append(title)
    unit = "walkers" if result.get("sampler_kind", "ensemble") == "ensemble" else "chains"
    lines.append(
        f"{result['replicas']} replica(s) x {result['walkers']} {unit} x "
        f"{result['steps']:,} steps ({selection or 'after burn-in'})"
    )
    lines.append(head)
    lines.append("-" * len(head))
    checks = result["verdict"]["params"]
    for name, d in result["params"].items():
        c = checks[name]
        lines.append(
            f"{name[:15]:<16}{_num(d['mean'], '11.5g')}{_num(d['sd'], '10.4g')}"
            f"{_num(d['mcse_mean'], '9.3g')}{_num(d.get('rhat_nested'), '8.4f')}"
            f"{_num(d['rhat'], '8.4f')}"
            f"{_num(d['ess_bulk'], '9.0f')}{_num(d['ess_tail'], '9.0f')}"
            f"{_num(d['tau'], '8.1f')}{_num(d['steps_per_tau'], '10.1f')}"
            f"{_num(d.get('tau_growth'), '7.3f')}{_num(c.get('steps_needed'), '13,d')}  "
            + _questions(c)
        )
    lines.append("")
    lines.extend(result["verdict"]["lines"])
    lines.extend(f"warning: {m}" for m in result["acceptance_warnings"])
    if result.get("basis"):
        lines.append(f"Basis: {result['basis']}")
    ar = result.get("accept_reject")
    if ar:
        lines.append(accept_reject_line(ar))
    if result.get("reference"):
        lines.extend(reference_lines(result["reference"]))
    lines.append("What each check compares:")
    lines.extend(
        f"  {key}: {text}" for key, text in result.get("what_each_check_compares", {}).items()
    )
    lines.append("Diagnostics can show non-convergence; they cannot prove convergence.")
    return "\n".join(lines)


def reference_lines(ref: dict[str, Any]) -> list[str]:
    """The two-sample comparison with a reference run, one line per parameter."""
    lines = [f"Compared with reference {ref['reference']} ({ref['method']}):"]
    for name, r in ref["params"].items():
        lines.append(
            f"  {name}: KS D = {r['ks_statistic']:.4f}, p = {r['ks_pvalue']:.3g} (effective "
            f"sizes {r['n_effective']:.0f} vs {r['m_effective']:.0f}), energy distance "
            f"{r['energy_distance']:.4g}; {'differs' if r['differs'] else 'consistent'}"
        )
    return lines
