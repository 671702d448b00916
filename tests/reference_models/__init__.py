"""Log densities of reference posteriors from posteriordb, for chainyard's integration tests.

Each module implements one or two densities of the open posterior collection posteriordb
(stan-dev/posteriordb, commit 28f8d3d6e975315f42aa274a8399f21e07a43b30, BSD-3-Clause; see
``tests/data/posteriordb/``) from the plain-language and math descriptions stored with the
reference values in ``tests/data/posteriordb/posteriors.json``. No Stan code was used.

Conventions shared by every function ``log_prob(theta, data)``:

* ``theta`` has shape (walkers, params) (one row per walker; a single 1-D point also works) and
  the result has shape (walkers,), or is a scalar for a 1-D point;
* parameters are on the *unconstrained* scale (log for positive parameters, logit for a
  probability, log-difference for an ordered pair), and the log-Jacobian of the map back to the
  constrained scale is added, so the density is the posterior of the unconstrained coordinates;
* additive constants are dropped;
* non-finite results (overflow far out in the tails) are returned as ``-inf``;
* ``data`` is the posterior's ``data`` dict as chainyard loads it from JSON (numeric lists become
  float64 arrays).

Modules: :mod:`.eight_schools` (centred and non-centred), :mod:`.kidiq`, :mod:`.ark`,
:mod:`.low_dim_gauss_mix`.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]


def as_rows(theta: npt.ArrayLike) -> tuple[FloatArray, bool]:
    """``theta`` as a 2-D (walkers, params) float array, and whether it was a single point."""
    arr = np.asarray(theta, dtype=np.float64)
    single = arr.ndim == 1
    return (arr[None, :] if single else arr), single


def finish(lp: FloatArray, single: bool) -> FloatArray | float:
    """Map NaN / non-finite values to -inf and undo the single-point promotion."""
    out = np.where(np.isfinite(lp), lp, -np.inf)
    return float(out[0]) if single else out
