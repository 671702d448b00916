"""Per-parameter diagnostics of a run's replicas, one parameter column at a time.

:func:`read_column` streams one parameter of every walker of every replica from the stores
a few stored chunks at a time; :func:`_param_diagnostics` computes that parameter's R-hats,
nested R-hat, tau (per replica and its growth), ESS and MCSE into two reused buffers.
:func:`chainyard.analysis.diagnose.diagnose` calls it for each parameter in turn.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from chainyard.analysis.signals import score_growth, tail_move_ratio, tail_rhat
from chainyard.diagnostics import (
    integrated_time,
    integrated_time_report,
    rhat,
    rhat_bulk,
    rhat_folded,
)
from chainyard.diagnostics._validation import MIN_DRAWS
from chainyard.diagnostics.nested import nested_rhat_folded_inplace, nested_rhat_of_scores
from chainyard.diagnostics.pooled import pooled_summary
from chainyard.errors import StoreError
from chainyard.store import Store

__all__ = ["READ_BYTES", "FloatArray", "read_column"]

FloatArray = npt.NDArray[np.float64]


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

    ``kind`` sets the basis (:data:`chainyard.analysis.diagnose_basis.BASIS`): for an
    ensemble R-hat uses the walker-mean traces, for independent chains every chain.

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
    tails = moves = None
    # on the normal scores in x (its middle column set to 0): robust to heavy tails
    growth = score_growth(x, stores) if np.isfinite(pooled["ess_bulk"]) else growth_raw
    if groups is not None and np.isfinite(pooled["ess_bulk"]):
        bulk = nested_rhat_of_scores(x, groups)  # x: normal scores of the split chains
        read_column(stores, j, steps, x, walker_means)
        tails = tail_rhat(x, stores, pooled["q05"], pooled["q95"])
        moves = tail_move_ratio(x, stores, pooled["q05"], pooled["q95"])
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
        "tail_move_ratio": moves,
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
            tail_move_ratio=None,
            tau_reliable=True,
            tau_messages=[],
            mcse_mean=_finite(sd / np.sqrt(n)) if sd is not None else None,
        )
    return out
