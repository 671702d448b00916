"""Two-sample comparison of a run's draws with a reference run's (``diagnose --reference``)."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from chainyard.analysis.diagnose import diagnose
from chainyard.analysis.diagnose_compute import FloatArray, read_column
from chainyard.config import TargetsSpec
from chainyard.errors import StoreError
from chainyard.store import Store

__all__ = ["compare_with_reference", "result_targets"]


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
