#!/usr/bin/env bash
# A fresh install works: `pip install .` WITHOUT extras into a new virtual environment, then
# the README's main commands on a tiny run (sample, decide burn-in, diagnose, results-table,
# plot, export to .nc/.zarr/.csv, inspect). Catches a feature whose dependency is only in the `test` extra.
# Usage: .ci/fresh_install_check.sh [PYTHON]   (about a minute; pip's cache makes it faster)
set -euo pipefail
cd "$(dirname "$0")/.."
PYTHON="${1:-${PYTHON:-python3}}"
WORK="$(mktemp -d "${TMPDIR:-/tmp}/chainyard-fresh.XXXXXX")"
trap 'rm -rf "$WORK"' EXIT

"$PYTHON" -m venv "$WORK/venv"
"$WORK/venv/bin/python" -m pip install --quiet .
CY="$WORK/venv/bin/chainyard"

cat > "$WORK/gauss.py" <<'PY'
import numpy as np


def log_prob(theta, data):
    return -0.5 * np.sum(theta**2, axis=1)
PY
cat > "$WORK/run.yaml" <<'YAML'
model:
  log_prob: gauss.py:log_prob
  vectorized: true
parameters:
  - name: a
    init: {normal: {loc: 0.0, scale: 1.0}}
  - name: b
    init: {normal: {loc: 0.0, scale: 1.0}}
sampler:
  walkers: 8
  steps: 400
seed: 3
YAML

cd "$WORK"
"$CY" check run.yaml
for r in 0 1; do
  "$CY" sample run.yaml --out "r$r.zarr" --replica "$r" --progress off
done
"$CY" --help > /dev/null
"$CY" decide burn-in r0.zarr r1.zarr --out burn_in.json
# diagnose exits 1 when the targets are not met (a tiny run may miss them): not a failure here
set +e
"$CY" diagnose r0.zarr r1.zarr --burn-in-record burn_in.json
status=$?
set -e
if [ "$status" -ne 0 ] && [ "$status" -ne 1 ]; then
  echo "fresh install: diagnose exited $status" >&2
  exit 1
fi
"$CY" results-table r0.zarr r1.zarr --burn-in-record burn_in.json > summary.csv
"$CY" plot r0.zarr r1.zarr --raw -o plots
for ext in nc zarr csv; do
  "$CY" export r0.zarr r1.zarr --raw -o "run.$ext"
  test -e "run.$ext"
done
test -s summary.csv
test -n "$(ls plots)"
"$WORK/venv/bin/python" - <<'PY'
import h5py  # netCDF export needs it: declared in the main dependencies

with h5py.File("run.nc", "r") as f:
    assert "posterior" in f, list(f)
PY
"$CY" inspect r0.zarr > /dev/null
echo "fresh install: sample, decide, diagnose, results-table, plot, export (.nc .zarr .csv), inspect ok"
