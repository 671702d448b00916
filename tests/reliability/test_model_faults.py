"""Model faults: a model that exits, interrupts, hangs or answers wrongly while extending a store.

Every fault runs ``chainyard sample`` in a real subprocess on a store that already holds
committed steps (an extension), and must end in one ``chainyard: error:`` line with the
documented exit status (3 for a call, 2 for an import; see :mod:`chainyard.errors`), no
traceback, and every committed byte unchanged. The model file is the same for every case (its
content is part of the store's identity); the fault is chosen by an environment variable.
``os._exit`` inside the model is the engine's abnormal-end case and is tested there.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

import chainyard
from tests.conftest import base_config, cli, write_run
from tests.reliability.conftest import Tally, snapshot

pytestmark = pytest.mark.slow

#: one model for every case; CY_FAULT picks the fault (empty: a standard normal)
FAULTY_MODEL = """
import os
import sys
import time

import numpy as np

FAULT = os.environ.get("CY_FAULT", "")
if FAULT == "import-exit-0":
    sys.exit(0)
if FAULT == "import-exit-3":
    sys.exit(3)
if FAULT == "import-keyboard":
    raise KeyboardInterrupt


def log_prob(theta, data):
    value = -0.5 * float(theta @ theta)
    if FAULT == "exit-0":
        sys.exit(0)
    if FAULT == "exit-3":
        sys.exit(3)
    if FAULT == "keyboard":
        raise KeyboardInterrupt
    if FAULT == "hang":
        time.sleep(600)
    if FAULT == "hang-swallow":
        try:
            time.sleep(600)
        except BaseException:
            return value
    if FAULT == "complex":
        return complex(value, 1.0)
    if FAULT == "array-1":
        return np.array([value])
    if FAULT == "nan":
        return float("nan")
    return value
"""

#: the same for a vectorized model: theta (walkers, params) -> (walkers,)
FAULTY_VECTOR_MODEL = """
import os

import numpy as np

FAULT = os.environ.get("CY_FAULT", "")


def log_prob(theta, data):
    value = -0.5 * np.einsum("ij,ij->i", theta, theta)
    if FAULT == "shape-column":
        return value[:, None]
    if FAULT == "shape-two-rows":
        return np.stack([value, value])
    if FAULT == "scalar":
        return float(value.sum())
    return value
"""

STEPS = 120  # committed before the faults
MORE = "240"  # the extension every fault interrupts

#: (fault, vectorized?, exit status, fragment of the one line). The other wrong answers (None,
#: text, +inf, short or object arrays, GeneratorExit, ...) run in-process in the bad-input
#: catalogue's "model output" rows, to keep this module's subprocesses to the ones that matter.
FAULTS: list[tuple[str, bool, int, str]] = [
    ("import-exit-0", False, 2, "failed: SystemExit(0); user code must not exit"),
    ("import-exit-3", False, 2, "failed: SystemExit(3); user code must not exit"),
    ("import-keyboard", False, 2, "KeyboardInterrupt; user code must not raise"),
    ("exit-0", False, 3, "raised SystemExit(0) at "),
    ("exit-3", False, 3, "raised SystemExit(3) at "),
    ("keyboard", False, 3, "raised KeyboardInterrupt at "),
    ("hang", False, 3, "ran longer than model.call_time_limit_seconds = 1 s at "),
    ("hang-swallow", False, 3, "ran longer than model.call_time_limit_seconds = 1 s at "),
    ("complex", False, 3, "returned a complex number ("),
    ("array-1", False, 3, "returned an array of shape (1,) and dtype float64 at "),
    ("nan", False, 3, "returned NaN at "),
    ("shape-column", True, 3, "(vectorized) returned shape (8, 1) for 8 walkers"),
    ("shape-two-rows", True, 3, "(vectorized) returned shape (2, 8) for 8 walkers"),
    ("scalar", True, 3, "(vectorized) returned a single value ("),
]


def _run(folder: Path, vectorized: bool) -> tuple[Path, Path]:
    cfg = base_config(sampler={"walkers": 16, "steps": STEPS}, storage={"chunk_steps": 50})
    cfg["model"]["call_time_limit_seconds"] = 1.0
    if vectorized:
        cfg["model"]["vectorized"] = True
    model = FAULTY_VECTOR_MODEL if vectorized else FAULTY_MODEL
    path = write_run(folder, cfg, model)
    return path, folder / "store.zarr"


@pytest.fixture(scope="module")
def stores(tmp_path_factory: pytest.TempPathFactory) -> dict[bool, tuple[Path, Path]]:
    """A plain and a vectorized store, each with STEPS committed steps."""
    out = {}
    for vectorized in (False, True):
        folder = tmp_path_factory.mktemp("vector" if vectorized else "plain")
        config, store = _run(folder, vectorized)
        res = cli("sample", str(config), "--out", str(store), "--progress", "off")
        assert res.returncode == 0, res.stderr
        out[vectorized] = (config, store)
    return out


def _committed_chunks(store: Path) -> dict[str, str]:
    """Hashes of the store's chunk files (the committed draws).

    The JSON metadata is left out: an extension records its new step target and array
    capacity before the first new step (a change of settings, not of committed draws).
    """
    return {k: v for k, v in snapshot(store).items() if not k.endswith(".json")}


def _one_line(stderr: str) -> str:
    lines = stderr.strip().splitlines()
    errors = [ln for ln in lines if ln.startswith("chainyard: error: ")]
    assert "Traceback" not in stderr, stderr
    assert len(errors) == 1, lines
    return errors[0]


@pytest.mark.parametrize(
    ("fault", "vectorized", "code", "fragment"),
    FAULTS,
    ids=[f"{f[0]}{'-vectorized' if f[1] else ''}" for f in FAULTS],
)
def test_model_fault_while_extending(
    fault: str,
    vectorized: bool,
    code: int,
    fragment: str,
    stores: dict[bool, tuple[Path, Path]],
    tally: Tally,
) -> None:
    """The fault ends in its one line and exit status; committed bytes are unchanged."""
    config, store = stores[vectorized]
    before = _committed_chunks(store)
    res = cli(
        "sample", str(config), "--out", str(store), "--steps", MORE, "--progress", "off",
        env={"CY_FAULT": fault},
    )  # fmt: skip
    tally.fault()
    line = _one_line(res.stderr)
    assert res.returncode == code, (res.returncode, res.stderr)
    assert fragment in line, line
    if code == 3:  # a call: the parameter values are named
        assert "x=" in line and "y=" in line, line
    tally.assert_intact(before, store, f"{fault} ({'vectorized' if vectorized else 'plain'})")
    assert chainyard.open_store(store).steps_done == STEPS


def test_store_extends_cleanly_after_the_faults(
    stores: dict[bool, tuple[Path, Path]], tmp_path: Path
) -> None:
    """After the faults, the same store extends without a fault and passes verify."""
    config, store = stores[False]
    copy = tmp_path / "store.zarr"
    shutil.copytree(store, copy)
    res = cli("sample", str(config), "--out", str(copy), "--steps", MORE, "--progress", "off")
    assert res.returncode == 0, res.stderr
    res = cli("verify", str(copy))
    assert res.returncode == 0, res.stdout + res.stderr


def test_time_limit_restores_the_previous_alarm() -> None:
    """Around a batch of user calls the previous SIGALRM handler and timer are restored."""
    import signal

    import numpy as np

    from chainyard.evaluator import LoadedModel

    seen: list[int] = []

    def handler(signum: int, frame: object) -> None:
        seen.append(signum)

    old = signal.signal(signal.SIGALRM, handler)
    try:
        signal.setitimer(signal.ITIMER_REAL, 5.0)
        model = LoadedModel(
            lambda t, d: 0.0, None, False, np.full(1, -np.inf), np.full(1, np.inf), ("x",), 0,
            walkers=4, call_time_limit=0.5,
        )  # fmt: skip
        assert model(np.zeros((4, 1))).tolist() == [0.0] * 4
        left, _ = signal.getitimer(signal.ITIMER_REAL)
        assert 4.0 < left <= 5.0  # the earlier timer is running again, less the time used
        assert signal.getsignal(signal.SIGALRM) is handler and not seen
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)


def _plain(func: object, walkers: int = 4) -> object:
    import numpy as np

    from chainyard.evaluator import LoadedModel

    return LoadedModel(
        func, None, False, np.full(1, -np.inf), np.full(1, np.inf), ("x",), 0, walkers=walkers
    )


def test_chainyard_stop_signal_passes_through() -> None:
    """The run loop's own stop (engine.run.Interrupted, a second SIGTERM) is not a model error."""
    import signal

    import numpy as np

    from chainyard.engine.run import Interrupted

    def log_prob(theta: object, data: object) -> float:
        raise Interrupted(signal.SIGTERM)

    with pytest.raises(Interrupted):
        _plain(log_prob)(np.zeros((4, 1)))  # type: ignore[operator]


def test_real_ctrl_c_passes_but_a_raised_one_is_a_model_error() -> None:
    """A real SIGINT during a call stays KeyboardInterrupt; `raise KeyboardInterrupt` is exit 3."""
    import os
    import signal

    import numpy as np

    from chainyard.errors import ModelError
    from chainyard.evaluator import watch_sigint

    old = signal.signal(signal.SIGINT, signal.default_int_handler)
    try:
        watch_sigint()

        def interrupted(theta: object, data: object) -> float:
            os.kill(os.getpid(), signal.SIGINT)  # as a user's Ctrl-C would
            return 0.0

        def raising(theta: object, data: object) -> float:
            raise KeyboardInterrupt

        with pytest.raises(KeyboardInterrupt):
            _plain(interrupted)(np.zeros((4, 1)))  # type: ignore[operator]
        with pytest.raises(ModelError, match="raised KeyboardInterrupt at walker 0"):
            _plain(raising)(np.zeros((4, 1)))  # type: ignore[operator]
    finally:
        signal.signal(signal.SIGINT, old)
