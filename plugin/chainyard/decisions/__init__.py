"""Burn-in, thinning and convergence-verdict policies.

Pure functions on numpy arrays / numbers that return frozen records
(:class:`BurnInDecision`, :class:`ThinningDecision`, :class:`Verdict`) whose
``to_dict()`` output is JSON-serialisable.
"""

from __future__ import annotations

from .burn_in import (
    burn_in_after_adaptation,
    burn_in_fixed,
    burn_in_fraction,
    burn_in_from_tau,
    combine_burn_in,
    default_burn_in,
)
from .geweke import burn_in_geweke, geweke_z
from .mser import burn_in_mser, mser_statistic
from .owen import acf_efficiency, ar1_efficiency, thin_cost_aware
from .records import BurnInDecision, ThinningDecision
from .targets import ParamCheck, Targets, Verdict, assess
from .thinning import thin_fixed, thin_from_tau, thin_none, thin_to_target

__all__ = [
    "BurnInDecision",
    "ParamCheck",
    "Targets",
    "ThinningDecision",
    "Verdict",
    "acf_efficiency",
    "ar1_efficiency",
    "assess",
    "burn_in_after_adaptation",
    "burn_in_fixed",
    "burn_in_fraction",
    "burn_in_from_tau",
    "burn_in_geweke",
    "burn_in_mser",
    "combine_burn_in",
    "default_burn_in",
    "geweke_z",
    "mser_statistic",
    "thin_cost_aware",
    "thin_fixed",
    "thin_from_tau",
    "thin_none",
    "thin_to_target",
]
