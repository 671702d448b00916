"""``diagnose`` on stores on disk runs in bounded memory: under an address-space limit too small
to load the store whole, it completes with correct values."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy.signal import lfilter

from chainyard.diagnostics import (
    ess_bulk,
    ess_tail,
    mcse_mean,
    mcse_quantile,
    rhat,
)
from chainyard.diagnostics.nested import nested_rhat
from chainyard.store import Store
from tests.patience import PATIENCE

PHI = 0.9
TAU = (1.0 + PHI) / (1.0 - PHI)  # AR(1) integrated autocorrelation time, analytic: 19
REPLICAS, WALKERS, PARAMS, STEPS, CHUNK = 2, 32, 6, 100_000, 1000
COLUMN = REPLICAS * WALKERS * STEPS * 8  # one parameter of all replicas and walkers: 51 MB
RAW = COLUMN * PARAMS  # 307 MB
#: Address space allowed above the child's baseline: the 4 columns of diagnose's documented
#: bound plus 0.5 column of slack, well below the 6 columns that loading the store takes.
BUDGET = int(4.5 * COLUMN)

CHILD = r"""
import json, re, resource, sys
import numpy as np
from chainyard.analysis import diagnose
from chainyard.config import TargetsSpec
from chainyard.store import Store

paths, budget = json.loads(sys.argv[1])
stores = [Store.open(p) for p in paths]
stores[0].column(0, 0, 10)  # zarr's I/O thread runs before the baseline is taken

def status(key):
    text = open("/proc/self/status").read()
    return int(re.search(rf"^{key}:\s+(\d+) kB", text, re.M).group(1)) * 1024

base = status("VmSize")
limit = base + budget
resource.setrlimit(resource.RLIMIT_AS, (limit, resource.getrlimit(resource.RLIMIT_AS)[1]))
res = diagnose(stores, TargetsSpec())
out = {"base": base, "limit": limit, "peak_vm": status("VmPeak"), "params": res["params"]}
try:  # the same limit must stop a whole-store load: the bound is real
    whole = [s.draws(0, s.steps_done) for s in stores]
    out["whole_load"] = "completed"
except MemoryError:
    out["whole_load"] = "MemoryError"
except Exception as e:  # the store layer may wrap numpy's allocation failure
    out["whole_load"] = "MemoryError" if "Unable to allocate" in str(e) else repr(e)
print("RESULT " + json.dumps(out))
"""


def write_ar1_store(path: Path, replica: int) -> None:
    """A store of independent stationary AR(1) walkers (phi = 0.9), every parameter alike."""
    rng = np.random.default_rng([2024, replica])
    record: dict[str, Any] = {
        "format_version": 1,
        "steps_done": 0,
        "random_state": None,
        "checksums": {},
        "segments": [],
    }
    attrs = {
        "param_names": [f"x{j}" for j in range(PARAMS)],
        "blob_names": [],
        "walkers": WALKERS,
        "replica": replica,
        "seed": 2024,
        "config": {},  # diagnose is given its targets; no run config is read
    }
    start = {"position": rng.standard_normal((WALKERS, PARAMS)), "log_prob": np.zeros(WALKERS)}
    store = Store.create(
        path,
        attrs=attrs,
        walkers=WALKERS,
        n_params=PARAMS,
        blob_names=(),
        capacity=STEPS,
        chunk_steps=CHUNK,
        codec="none",
        level=None,
        start=start,
        commit=record,
        fsync=False,
    )
    zi = rng.standard_normal((1, WALKERS * PARAMS)) * PHI / math.sqrt(1.0 - PHI**2)
    block = 25 * CHUNK
    for a in range(0, STEPS, block):
        e = rng.standard_normal((block, WALKERS * PARAMS))
        x, zi = lfilter([1.0], [1.0, -PHI], e, axis=0, zi=zi)
        pos = x.reshape(block, WALKERS, PARAMS)
        rows = {
            "position": pos,
            "log_prob": -0.5 * (pos**2).sum(axis=-1),
            "accepted": rng.random((block, WALKERS)) < 0.4,
        }
        store.write_rows(a, rows, fsync=False)
    store.commit({**record, "steps_done": STEPS}, fsync=False)
    store.close()


@pytest.mark.slow
def test_diagnose_completes_under_a_limit_smaller_than_the_store(tmp_path: Path) -> None:
    """Under RLIMIT_AS = baseline + 4.5 columns (< the 6-column store) diagnose completes and
    equals the in-memory diagnostics; loading the store whole fails under the same limit."""
    paths = [tmp_path / f"r{r}.zarr" for r in range(REPLICAS)]
    for r, p in enumerate(paths):
        write_ar1_store(p, r)
    env = {**os.environ, "MALLOC_ARENA_MAX": "2"}  # glibc: no 64 MiB reservation per thread
    payload = json.dumps([[str(p) for p in paths], BUDGET])
    proc = subprocess.run(
        [sys.executable, "-c", CHILD, payload],
        capture_output=True,
        text=True,
        env=env,
        timeout=PATIENCE,  # a hang, not a slow machine, must fail
        check=False,
    )
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")]
    assert proc.returncode == 0 and lines, proc.stderr[-2000:]
    out = json.loads(lines[-1][len("RESULT ") :])
    assert out["limit"] - out["base"] < RAW  # the limit leaves less room than the raw store
    assert out["whole_load"] == "MemoryError"
    assert out["peak_vm"] <= out["limit"]
    params = out["params"]
    for name, d in params.items():
        # analytic result: AR(1) has tau = (1 + phi) / (1 - phi) = 19; estimated from 64
        # walkers x 100,000 steps, within 10% (statistical tolerance, seeded data)
        assert d["tau"] == pytest.approx(TAU, rel=0.10), name
        # analytic result: ESS = draws / tau (Vehtari et al. 2021, Bayesian Analysis 16(2))
        assert d["ess_bulk"] == pytest.approx(REPLICAS * WALKERS * STEPS / TAU, rel=0.10), name
        assert d["rhat"] < 1.01, name  # Vehtari et al. 2021 threshold
        # stationary independent replicas: nested R-hat ~ sqrt(1 + 1/ESS_replica) (derivation in
        # chainyard.diagnostics.nested) and tau no longer growing (whole vs first half)
        assert d["rhat_nested"] < 1.001, name
        assert d["tau_growth"] == pytest.approx(1.0, abs=0.1), name
    # The streamed values equal the in-memory functions on the same draws (parameter x0; the
    # in-memory functions agree with arviz-stats, tests/unit/test_diagnostics_arviz_agreement).
    stores = [Store.open(p) for p in paths]
    cols = [s.column(0, 0, STEPS) for s in stores]
    walkers = np.concatenate([c.T for c in cols], axis=0)
    replicas = np.stack([c.mean(axis=1) for c in cols])
    d = params["x0"]
    assert d["ess_bulk"] == pytest.approx(ess_bulk(walkers), rel=1e-12)
    assert d["ess_tail"] == pytest.approx(ess_tail(walkers), rel=1e-12)
    assert d["mcse_mean"] == pytest.approx(mcse_mean(walkers), rel=1e-12)
    assert d["mcse_q05"] == pytest.approx(mcse_quantile(walkers, 0.05), rel=1e-12)
    assert d["rhat"] == pytest.approx(rhat(replicas), rel=1e-12)
    assert d["sd"] == pytest.approx(float(walkers.std(ddof=1)), rel=1e-12)
    # the bounded-memory nested R-hat equals the one-call function (itself checked against
    # arviz-stats in tests/unit/test_diagnostics_nested.py)
    assert d["rhat_nested"] == pytest.approx(nested_rhat(walkers, REPLICAS), rel=1e-12)
