"""The verdict's decisions per sampler kind, through the real CLI on real stores.

Accept-reject draws are exact and independent (Robert and Casella 2004, section 2.3): the
burn-in decision for them is 0 steps with the reason recorded, whatever data-driven policy
the config names; a ``fixed`` burn-in is applied as asked.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import cli, write_run

PARAMETERS = [
    {"name": "x", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
    {"name": "y", "init": {"normal": {"loc": 0.0, "scale": 1.0}}},
]


def _accept_reject(folder: Path, burn_in: dict[str, Any] | None) -> Path:
    config: dict[str, Any] = {
        "model": {"log_prob": "model.py:log_prob"},
        "parameters": PARAMETERS,
        # log f - log g <= 2 (log 2 + log(2 pi) / 2) = 3.2242 for g = N(0, 2^2) (analytic)
        "sampler": {
            "kind": "accept_reject",
            "envelope": [{"normal": {"loc": 0.0, "scale": 2.0}}] * 2,
            "log_bound": 3.3,
            "draws": 400,
            "chains": 4,
        },
        "seed": 3,
    }
    if burn_in is not None:
        config["burn_in"] = burn_in
    cfg = write_run(folder, config)
    out = folder / "ar.zarr"
    res = cli("sample", str(cfg), "--out", str(out), "--progress", "off")
    assert res.returncode == 0, res.stderr
    return out


@pytest.mark.parametrize(
    ("burn_in", "expected"),
    [
        (None, 0),
        ({"policy": "mser"}, 0),
        ({"policy": "fraction", "fraction": 0.25}, 0),
        ({"policy": "fixed", "steps": 7}, 7),
    ],
    ids=["default", "mser", "fraction", "fixed"],
)
def test_accept_reject_needs_no_burn_in(
    tmp_path: Path, burn_in: dict[str, Any] | None, expected: int
) -> None:
    """decide burn-in on accept-reject draws: 0 with the reason, unless fixed was asked."""
    store = _accept_reject(tmp_path, burn_in)
    record = tmp_path / "bi.json"
    res = cli("decide", "burn-in", str(store), "--out", str(record))
    assert res.returncode == 0, res.stderr
    decision = json.loads(record.read_text())["decision"]
    assert decision["steps_discarded"] == expected
    if expected == 0:
        assert decision["policy"] == "none (accept-reject)"
        assert "exact, independent draws" in decision["reason"]
        assert "exact, independent draws" in res.stdout
        policy = (burn_in or {"policy": "default"})["policy"]
        assert decision["inputs"]["configured_policy"] == policy
    else:
        assert decision["policy"] == "fixed"
