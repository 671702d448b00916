"""The loopback SLURM cluster as a fixture (skips where it cannot run, see slurm_cluster)."""

from __future__ import annotations

import os
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.cluster.slurm_cluster import SlurmCluster, ensure_packages, slurm_cluster
from tests.cluster.slurm_cluster import unavailable_reason as cluster_unavailable


def unavailable_reason() -> str | None:
    """Why the cluster tests skip here (None: they run)."""
    if os.environ.get("CHAINYARD_SKIP_SLURM"):
        return "CHAINYARD_SKIP_SLURM is set"
    return cluster_unavailable()


@pytest.fixture(scope="module")
def slurm() -> Iterator[SlurmCluster]:
    """A one-node SLURM cluster on 127.0.0.1, packages installed with apt if missing.

    Skips (with the reason) when not root, not Linux, or neither SLURM nor apt-get is there.
    """
    reason = unavailable_reason()
    if reason:
        pytest.skip(reason)
    with tempfile.TemporaryDirectory(prefix="cy-apt-") as tmp:
        spent = ensure_packages(Path(tmp) / "apt.log")
    start = time.monotonic()
    with slurm_cluster() as cluster:
        print(f"\nSLURM test cluster: packages {spent:.1f} s, start "
              f"{time.monotonic() - start:.1f} s, root {cluster.root}")
        yield cluster
