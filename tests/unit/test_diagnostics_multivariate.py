"""Multivariate ESS and minimum ESS (Vats, Flegal & Jones 2019)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.signal import lfilter
from scipy.stats import chi2

from chainyard.diagnostics import min_ess, multivariate_ess


def test_min_ess_p1_matches_stated_value() -> None:
    """min_ess(1, 0.05, 0.05) = 6147, the value recalled from Vats et al. 2019 / mcmcse."""
    # from memory (brief): 6147. Formula: 4 * chi2_{0.95,1} / 0.05^2 = 6146.33, ceiling 6147.
    # mcmcse's own code (dvats/mcmcse R/minESS.R) rounds to nearest and would print 6146.
    bound = 4 * chi2.ppf(0.95, 1) / 0.05**2
    assert bound == pytest.approx(6146.33, abs=0.01)
    assert min_ess(1, alpha=0.05, eps=0.05) == 6147 == math.ceil(bound)
    assert round(bound) == 6146


def test_min_ess_p1_closed_form() -> None:
    """p = 1 reduces to 4 chi2_{0.95,1} / eps^2 (analytic: Gamma(1/2)^2 = pi)."""
    assert min_ess(1, 0.05, 0.1) == math.ceil(4 * chi2.ppf(0.95, 1) / 0.01)


def test_min_ess_large_p_limit() -> None:
    """For large p the bound tends to 2 pi e / eps^2 (analytic: Stirling + chi2_p ~ p)."""
    assert min_ess(100_000) == pytest.approx(2 * math.pi * math.e / 0.05**2, rel=0.02)


def test_mess_iid_near_n() -> None:
    """iid draws: mESS ~ n within 15% (Vats et al. 2019: mESS = n when Sigma = Lambda)."""
    x = np.random.default_rng(0).standard_normal((100_000, 3))
    # tolerance: ~3 sd of log-det noise with 316 batches, sqrt(2 / (p a)) ~ 4.6%
    assert multivariate_ess(x) == pytest.approx(100_000, rel=0.15)


def test_mess_ar1_components_near_n_over_tau() -> None:
    """Independent AR(1) components with equal phi: mESS ~ n / tau (analytic)."""
    rng = np.random.default_rng(1)
    phi = 0.8
    e = rng.standard_normal((3, 100_000, 2))
    e[:, 0] /= np.sqrt(1 - phi**2)
    x = lfilter([1.0], [1.0, -phi], e, axis=1)
    tau = (1 + phi) / (1 - phi)  # analytic: AR(1) tau = (1+phi)/(1-phi)
    assert multivariate_ess(x) == pytest.approx(x.shape[0] * x.shape[1] / tau, rel=0.15)


def test_mess_input_validation() -> None:
    """Wrong shapes, NaN and too few batches raise ValueError."""
    with pytest.raises(ValueError):
        multivariate_ess(np.zeros(10))
    with pytest.raises(ValueError):
        multivariate_ess(np.full((100, 2), np.nan))
    with pytest.raises(ValueError):
        multivariate_ess(np.zeros((100, 2)), batch_size=100)


def test_min_ess_validation() -> None:
    """Non-integer p or out-of-range alpha raise ValueError."""
    with pytest.raises(ValueError):
        min_ess(0)
    with pytest.raises(ValueError):
        min_ess(2, alpha=1.5)
