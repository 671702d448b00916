"""MCMC diagnostics on numpy arrays, one parameter at a time.

Every single-parameter function takes ``x`` of shape (chains, draws).
For R-hat / ESS the chains must be independent replicas; for
:func:`integrated_time` they are the walkers of one emcee ensemble. See
:mod:`chainyard.diagnostics.rhat` and :mod:`chainyard.diagnostics.ensemble`.
"""

from __future__ import annotations

from ._acf import autocorrelation, autocovariance
from .acceptance import AcceptanceReport, acceptance_report
from .autocorr import (
    IntegratedTimeReport,
    integrated_time,
    integrated_time_history,
    integrated_time_report,
)
from .ensemble import ensemble_to_chains, walkers_as_chains
from .ess import ess_bulk, ess_mean, ess_quantile, ess_sd, ess_tail
from .mcse import mcse_mean, mcse_quantile, mcse_sd
from .multivariate import min_ess, multivariate_ess
from .pooled import pooled_summary
from .rhat import rhat, rhat_bulk, rhat_folded
from .vectorised import ess_bulk_per_param, ess_tail_per_param, per_param, rhat_per_param

__all__ = [
    "AcceptanceReport",
    "IntegratedTimeReport",
    "acceptance_report",
    "autocorrelation",
    "autocovariance",
    "ensemble_to_chains",
    "ess_bulk",
    "ess_bulk_per_param",
    "ess_mean",
    "ess_quantile",
    "ess_sd",
    "ess_tail",
    "ess_tail_per_param",
    "integrated_time",
    "integrated_time_history",
    "integrated_time_report",
    "mcse_mean",
    "mcse_quantile",
    "mcse_sd",
    "min_ess",
    "multivariate_ess",
    "per_param",
    "pooled_summary",
    "rhat",
    "rhat_bulk",
    "rhat_folded",
    "rhat_per_param",
    "walkers_as_chains",
]
