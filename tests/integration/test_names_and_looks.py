"""Our own names and looks: the pairs figure, accept-reject stores in `plot` and `inspect`,
walkers/chains words, the overview's words and page at many runs.

Real stores sampled by the real command line; the figure is inspected as matplotlib built it.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import chainyard
from chainyard.report.pairs import pairs_figure, region_thresholds
from tests.conftest import cli, write_run

MODEL = """
import numpy as np

def log_prob(theta, data):
    return -0.5 * float(np.dot(theta, theta))
"""
PARAMETERS = [
    {"name": "x", "init": {"normal": {"loc": 0.0, "scale": 1.0}}, "reference_value": 0.1},
    {"name": "y", "init": {"uniform": {"low": -1.0, "high": 1.0}}, "reference_value": -0.2},
    {"name": "z", "init": {"uniform": {"low": -1.0, "high": 1.0}}},
]
# log f = -|x|^2 / 2 under g = N(0, 2^2) per parameter: log f - log g <= 3 (log 2 +
# log(2 pi) / 2) = 4.836 (analytic), so log M = 5 is a valid bound
ACCEPT_REJECT = {
    "kind": "accept_reject",
    "envelope": [{"normal": {"loc": 0.0, "scale": 2.0}}] * 3,
    "log_bound": 5.0,
    "draws": 400,
    "chains": 4,
}


def _sample(folder: Path, sampler: dict[str, Any], replicas: int = 2) -> list[Path]:
    cfg = write_run(
        folder,
        {"model": {"log_prob": "model.py:log_prob"}, "parameters": PARAMETERS,
         "sampler": sampler, "seed": 3, "replicas": replicas},
        MODEL,
    )  # fmt: skip
    out = []
    for r in range(replicas):
        path = folder / f"r{r}.zarr"
        res = cli("sample", str(cfg), "--out", str(path), "--replica", str(r), "--progress", "off")
        assert res.returncode == 0, res.stderr
        out.append(path)
    return out


@pytest.fixture(scope="module")
def ensemble(tmp_path_factory: pytest.TempPathFactory) -> list[Path]:
    return _sample(tmp_path_factory.mktemp("ensemble"), {"walkers": 8, "steps": 600})


@pytest.fixture(scope="module")
def exact(tmp_path_factory: pytest.TempPathFactory) -> list[Path]:
    return _sample(tmp_path_factory.mktemp("exact"), ACCEPT_REJECT)


def test_pairs_figure_structure(ensemble: list[Path]) -> None:
    """k x k panels: per-replica densities on the diagonal, per-replica region outlines
    below, r and its MCSE above (r equal to numpy's corrcoef of the pooled draws), a
    diamond where two reference values meet, and a legend naming replicas and levels."""
    stores = [chainyard.open_store(p) for p in ensemble]
    fig = pairs_figure(stores, references={"x": 0.1, "y": -0.2})
    axes = np.array(fig.axes[: 9]).reshape(3, 3)
    pooled = {
        n: np.concatenate([s.column(n).T for s in stores]).ravel() for n in ("x", "y", "z")
    }
    for k in range(3):
        assert len(axes[k, k].get_lines()) >= 2  # one density line per replica
        assert axes[k, k].get_title().startswith(("x", "y", "z"))
    for r, c in ((1, 0), (2, 0), (2, 1)):
        colours = {tuple(np.round(col.get_edgecolor()[0], 3)) for col in axes[r, c].collections}
        assert len(colours) == 2  # one outline colour per replica
    names = ("x", "y", "z")
    for r, c in ((0, 1), (0, 2), (1, 2)):
        (text,) = [t.get_text() for t in axes[r, c].texts]
        found = re.match(r"r = (-?\d+\.\d+)\n± (\S+) \(MCSE\)\nreplicas", text)
        assert found, text
        expected = np.corrcoef(pooled[names[r]], pooled[names[c]])[0, 1]  # reference: numpy
        assert float(found.group(1)) == pytest.approx(expected, abs=0.006)
        assert float(found.group(2)) > 0
    diamonds = [ln for ln in axes[1, 0].get_lines() if ln.get_marker() == "D"]
    assert len(diamonds) == 1 and tuple(diamonds[0].get_xydata()[0]) == (0.1, -0.2)
    labels = [t.get_text() for t in fig.legends[0].get_texts()]
    assert labels[:2] == ["replica 0", "replica 1"]
    assert "50% region" in labels and "90% region" in labels and "reference value" in labels


def test_region_thresholds_match_the_normal_disk() -> None:
    """For a standard bivariate normal the 50% highest-density region is the disk of radius
    sqrt(2 ln 2) (analytic); the smoothed-histogram region has that area within 10%."""
    rng = np.random.default_rng(1)
    xy = rng.standard_normal((400_000, 2))
    edges = np.linspace(-4, 4, 81)
    h, _, _ = np.histogram2d(xy[:, 0], xy[:, 1], bins=(edges, edges))
    from chainyard.report.pairs_density import _smooth

    dens = _smooth(h)
    t90, t50 = region_thresholds(dens, (0.5, 0.9))
    cell = (edges[1] - edges[0]) ** 2
    assert (dens >= t50).sum() * cell == pytest.approx(np.pi * 2 * np.log(2), rel=0.1)
    assert (dens >= t90).sum() * cell == pytest.approx(np.pi * 2 * np.log(10), rel=0.1)


def test_plot_accepts_accept_reject_stores_and_says_chains(exact: list[Path]) -> None:
    """Exact draws need no burn-in record: `plot` and `results-table` read every draw and say
    so; the traces say "chain", not "walker"."""
    folder = exact[0].parent
    res = cli("plot", "r0.zarr", "r1.zarr", "-o", "plots", cwd=folder)
    assert res.returncode == 0, res.stderr
    assert "accept-reject draws are exact: no burn-in" in res.stdout
    assert all((folder / "plots" / f"{n}.png").stat().st_size > 0
               for n in ("traces", "tau", "pairs", "acceptance"))  # fmt: skip
    res = cli("results-table", "r0.zarr", "r1.zarr", cwd=folder)
    assert res.returncode == 0, res.stderr
    assert "4 chains x 400 draws" in res.stdout
    from chainyard.report.plots import trace_figure

    stores = [chainyard.open_store(p) for p in exact]
    fig = trace_figure(stores, None)
    text = fig.texts[0].get_text() + " ".join(t.get_text() for t in fig.legends[0].get_texts())
    assert "chain" in text and "walker" not in text


def test_inspect_accept_reject_line_is_readable(exact: list[Path]) -> None:
    """`inspect` writes the acceptance rate and 1/M in readable numbers (no 40-digit floats,
    no "+- 0.0000"), and says how 1/M compares with the rate."""
    res = cli("inspect", str(exact[0]))
    assert res.returncode == 0, res.stderr
    (line,) = [ln for ln in res.stdout.splitlines() if "1/M" in ln]
    assert not re.search(r"\d{8,}", line) and "+- 0.0000" not in line
    assert "1/M = 0.006738" in line  # exp(-5)
    assert "not normalised" in line or "normalised target" in line
