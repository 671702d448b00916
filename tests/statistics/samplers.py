"""Batched ensemble samplers for the study: many independent runs stepped together.

Each *run* owns one ``numpy.random.Generator`` and ``replicas`` independent ensembles; a
run's draws depend only on its own generator (its random numbers are drawn from it in
blocks of steps), never on which other runs share the batch. The batch exists only to
amortise numpy's per-call overhead.

* :func:`stretch` is the affine-invariant stretch move of Goodman and Weare (2010),
  Communications in Applied Mathematics and Computational Science 5(1), 65-80, in the
  form emcee 3 uses (``StretchMove``, a = 2, two halves with a random split at every step;
  the halves are updated in turn, the second against the updated first). ``stuck`` marks
  walkers whose proposals are always rejected (a walker that never moves).
* :func:`random_walk` is a Gaussian random-walk Metropolis step per walker (Metropolis et
  al. 1953) with a fixed diagonal proposal scale, as emcee's ``GaussianMove`` with a
  diagonal covariance.
* :func:`gibbs_pair` is the systematic-scan Gibbs sampler of a bivariate Gaussian with unit
  variances and correlation ``rho`` (Geman and Geman 1984): ``u | v ~ N(rho v, 1 - rho^2)``,
  then ``v | u``. Each coordinate's chain is then AR(1) with coefficient ``rho^2``, so its
  integrated autocorrelation time is ``(1 + rho^2) / (1 - rho^2)`` sweeps (Liu, Wong and
  Kong 1994, Biometrika 81(1), section 3; from memory).
* :func:`exact_draws` gives independent exact draws, as an accept-reject run stores them.

Outputs have the layout of a run's replica stores: ``draws`` (runs, replicas, steps,
walkers, d), ``log_prob`` and ``accepted`` (runs, replicas, steps, walkers).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]
LogProb = Callable[[FloatArray], FloatArray]

BLOCK = 256  # steps of random numbers drawn from each run's generator at a time


@dataclass
class Runs:
    """Draws of a batch of runs (see the module docstring for shapes)."""

    draws: FloatArray
    log_prob: FloatArray
    accepted: BoolArray


def _uniforms(gens: Sequence[np.random.Generator], k: int, t: int, r: int, w: int) -> FloatArray:
    """``k`` uniform arrays (t, runs * r, w), each run's block drawn from its own generator."""
    blocks = [g.random((k, t, r, w)) for g in gens]
    return np.concatenate(blocks, axis=2)


def _allocate(n: int, r: int, steps: int, w: int, d: int) -> Runs:
    return Runs(
        np.empty((n, r, steps, w, d)),
        np.empty((n, r, steps, w)),
        np.empty((n, r, steps, w), dtype=bool),
    )


def stretch(
    log_prob: LogProb,
    start: FloatArray,
    steps: int,
    gens: Sequence[np.random.Generator],
    *,
    a: float = 2.0,
    stuck: BoolArray | None = None,
) -> Runs:
    """Run the stretch move on every ensemble of a batch.

    Parameters
    ----------
    log_prob : callable
        Vectorised log density, (..., d) -> (...).
    start : ndarray, shape (runs, replicas, walkers, d)
        Initial positions (finite log density).
    steps : int
        Steps to record (the start itself is not recorded).
    gens : sequence of Generator
        One per run.
    a : float
        Stretch scale (emcee's default 2).
    stuck : ndarray of bool, shape (runs, replicas, walkers), optional
        Walkers whose proposals are always rejected.

    Returns
    -------
    Runs
    """
    n, r, w, d = start.shape
    if w % 2:
        raise ValueError("an even number of walkers is required")
    h = w // 2
    e = n * r
    x = start.reshape(e, w, d).copy()
    lp = log_prob(x)
    if not np.isfinite(lp).all():
        raise ValueError("start has non-finite log density")
    frozen = None if stuck is None else stuck.reshape(e, w)
    out = _allocate(n, r, steps, w, d)
    draws = out.draws.reshape(n * r, steps, w, d)  # views (C-ordered: the reshape is free)
    lps = out.log_prob.reshape(e, steps, w)
    accs = out.accepted.reshape(e, steps, w)
    rows = np.arange(e)[:, None]
    for t0 in range(0, steps, BLOCK):
        tb = min(BLOCK, steps - t0)
        u = _uniforms(gens, 5, tb, r, w)  # split, z, complement, accept (two halves)
        for i in range(tb):
            perm = np.argsort(u[0, i], axis=1)
            halves = (perm[:, :h], perm[:, h:])
            moved = np.zeros((e, w), dtype=bool)
            for k in (0, 1):
                s_idx, c_idx = halves[k], halves[1 - k]
                s = x[rows, s_idx]
                uz = u[1, i][rows, s_idx]
                zz = ((a - 1.0) * uz + 1.0) ** 2 / a
                pick = np.minimum((u[2, i][rows, s_idx] * h).astype(np.intp), h - 1)
                c = x[rows, c_idx[rows, pick]]
                y = c - (c - s) * zz[..., None]
                lp_y = log_prob(y)
                with np.errstate(invalid="ignore"):
                    diff = (d - 1.0) * np.log(zz) + lp_y - lp[rows, s_idx]
                ua = u[3 + k, i][rows, s_idx]
                ok = diff > np.log(ua)
                if frozen is not None:
                    ok &= ~frozen[rows, s_idx]
                rr, cc = np.nonzero(ok)
                x[rr, s_idx[rr, cc]] = y[rr, cc]
                lp[rr, s_idx[rr, cc]] = lp_y[rr, cc]
                moved[rr, s_idx[rr, cc]] = True
            t = t0 + i
            draws[:, t] = x
            lps[:, t] = lp
            accs[:, t] = moved
    return out


def random_walk(
    log_prob: LogProb,
    start: FloatArray,
    steps: int,
    gens: Sequence[np.random.Generator],
    scale: FloatArray,
) -> Runs:
    """Gaussian random-walk Metropolis, each walker on its own, proposal sd ``scale`` (d,)."""
    n, r, w, d = start.shape
    e = n * r
    x = start.reshape(e, w, d).copy()
    lp = log_prob(x)
    out = _allocate(n, r, steps, w, d)
    draws = out.draws.reshape(e, steps, w, d)
    lps = out.log_prob.reshape(e, steps, w)
    accs = out.accepted.reshape(e, steps, w)
    for t0 in range(0, steps, BLOCK):
        tb = min(BLOCK, steps - t0)
        blocks = [(g.standard_normal((tb, r, w, d)), g.random((tb, r, w))) for g in gens]
        z = np.concatenate([b[0] for b in blocks], axis=1)
        u = np.concatenate([b[1] for b in blocks], axis=1)
        for i in range(tb):
            y = x + z[i] * scale
            lp_y = log_prob(y)
            ok = lp_y - lp > np.log(u[i])
            x[ok] = y[ok]
            lp[ok] = lp_y[ok]
            t = t0 + i
            draws[:, t] = x
            lps[:, t] = lp
            accs[:, t] = ok
    return out


#: steps per adaptation window (as chainyard.engine.metropolis.ADAPT_WINDOW)
ADAPT_WINDOW = 50


def adaptive_random_walk(
    log_prob: LogProb,
    start: FloatArray,
    steps: int,
    gens: Sequence[np.random.Generator],
    scale: FloatArray,
    adapt_steps: int,
    target: float = 0.234,
) -> Runs:
    """Random-walk Metropolis per chain with the engine's adaptation, then frozen.

    Each chain's proposal sd is ``scale * exp(log_s)``; after every window of
    :data:`ADAPT_WINDOW` steps during the first ``adapt_steps`` steps, ``log_s += (a_hat -
    target) / sqrt(k)`` for the k-th window (Robbins and Monro 1951; Andrieu and Thoms 2008,
    section 4), as ``chainyard.engine.metropolis`` does; frozen afterwards, so chains end
    with different scales, as real adapted runs do.
    """
    n, r, w, d = start.shape
    e = n * r
    x = start.reshape(e, w, d).copy()
    lp = log_prob(x)
    log_s = np.zeros((e, w))
    window = np.zeros((e, w))
    out = _allocate(n, r, steps, w, d)
    draws = out.draws.reshape(e, steps, w, d)
    lps = out.log_prob.reshape(e, steps, w)
    accs = out.accepted.reshape(e, steps, w)
    for t0 in range(0, steps, BLOCK):
        tb = min(BLOCK, steps - t0)
        blocks = [(g.standard_normal((tb, r, w, d)), g.random((tb, r, w))) for g in gens]
        z = np.concatenate([b[0] for b in blocks], axis=1)
        u = np.concatenate([b[1] for b in blocks], axis=1)
        for i in range(tb):
            t = t0 + i
            y = x + z[i] * scale * np.exp(log_s)[..., None]
            lp_y = log_prob(y)
            ok = lp_y - lp > np.log(u[i])
            x[ok] = y[ok]
            lp[ok] = lp_y[ok]
            draws[:, t] = x
            lps[:, t] = lp
            accs[:, t] = ok
            if t < adapt_steps:
                window += ok
                done = t + 1
                if done % ADAPT_WINDOW == 0 or done == adapt_steps:
                    k = (done + ADAPT_WINDOW - 1) // ADAPT_WINDOW
                    size = done - (k - 1) * ADAPT_WINDOW
                    log_s += (window / size - target) / np.sqrt(k)
                    window[:] = 0.0
    return out


def gibbs_pair(
    start: FloatArray, steps: int, gens: Sequence[np.random.Generator], rho: float
) -> Runs:
    """Systematic-scan Gibbs sweeps of the bivariate Gaussian (module docstring); every
    sweep moves, so ``accepted`` is all True."""
    n, r, w, d = start.shape
    e = n * r
    x = start.reshape(e, w, d).copy()
    s = np.sqrt(1.0 - rho * rho)
    out = _allocate(n, r, steps, w, d)
    draws = out.draws.reshape(e, steps, w, d)
    out.accepted[:] = True
    for t0 in range(0, steps, BLOCK):
        tb = min(BLOCK, steps - t0)
        z = np.concatenate([g.standard_normal((tb, r, w, 2)) for g in gens], axis=1)
        for i in range(tb):
            x[..., 0] = rho * x[..., 1] + s * z[i, ..., 0]
            x[..., 1] = rho * x[..., 0] + s * z[i, ..., 1]
            draws[:, t0 + i] = x
    out.log_prob[:] = (
        -0.5
        * (
            (out.draws[..., 0] ** 2 - 2 * rho * out.draws[..., 0] * out.draws[..., 1])
            + out.draws[..., 1] ** 2
        )
        / (1 - rho * rho)
    )
    return out


def exact_draws(
    exact: Callable[[np.random.Generator, tuple[int, ...]], FloatArray],
    log_prob: LogProb,
    shape: tuple[int, int, int],
    gens: Sequence[np.random.Generator],
) -> Runs:
    """Independent draws of ``shape`` (replicas, steps, chains) per run from ``exact``."""
    draws = np.stack([exact(g, shape) for g in gens])
    lp = log_prob(draws)
    return Runs(draws, lp, np.ones(lp.shape, dtype=bool))
