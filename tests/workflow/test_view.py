"""Selections read through StoreWindow views equal numpy slicing of the stored arrays
(``positions[start:stop:factor]``, numpy's slice semantics as the reference), for every
reading method and sub-range, including windows cut short of the stored steps."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import chainyard
from chainyard.analysis.view import StoreWindow
from chainyard.config import parse_config
from tests.workflow.conftest import gauss_run


@pytest.fixture(scope="module")
def store(tmp_path_factory: pytest.TempPathFactory) -> chainyard.Store:
    folder = tmp_path_factory.mktemp("view")
    (folder / "gauss.py").write_text(
        "import numpy as np\n\ndef log_prob(theta, data):\n"
        "    return -0.5 * np.sum(theta * theta, axis=1)\n"
    )
    run = gauss_run(steps=230, replicas=1)
    run["model"]["log_prob"] = "gauss.py:log_prob"
    run["storage"] = {"fsync": False, "chunk_steps": 50}
    config = parse_config(run, base_dir=folder)
    return chainyard.sample(config, folder / "s.zarr", 0, progress="off")


@pytest.mark.parametrize(("start", "stop", "factor"),
                         [(0, None, 1), (17, None, 1), (17, 150, 7), (5, 230, 3), (0, 60, 4),
                          (100, 999, 50)])
def test_window_equals_slicing(store: chainyard.Store, start: int, stop: int | None,
                               factor: int) -> None:
    w = StoreWindow(store, start, stop, factor)
    end = 230 if stop is None else min(stop, 230)
    ref = store.draws()[start:end:factor]
    assert w.steps_done == ref.shape[0]
    assert w.chunk_steps == max(1, 50 // factor)
    assert np.array_equal(w.draws(), ref)
    assert np.array_equal(w.column("y"), ref[:, :, 1])
    assert np.array_equal(w.column(0, 2, 9), ref[2:9, :, 0])
    assert np.array_equal(w.log_prob(-5), store.log_prob()[start:end:factor][-5:])
    assert np.array_equal(w.accepted(1, 3), store.accepted()[start:end:factor][1:3])
    assert w.source is store and w.param_names == store.param_names
    assert w.array_names() == store.array_names() and w.attrs == store.attrs
    rows = store.read_rows("log_prob", 0, store.steps_done)[start:end:factor]
    assert np.array_equal(w.read_rows("log_prob", 1, 6), rows[1:6])
    assert np.array_equal(w.read_rows("log_prob", 0, w.steps_done, 2), rows[::2])


def test_window_refuses_empty(store: chainyard.Store) -> None:
    with pytest.raises(ValueError, match="window start 230 outside"):
        StoreWindow(store, 230)
    with pytest.raises(ValueError, match="must be >= 1"):
        StoreWindow(store, 0, None, 0)


def test_path_is_the_store(store: chainyard.Store) -> None:
    assert Path(StoreWindow(store, 3).path) == Path(store.path)
