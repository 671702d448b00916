"""Bad input: each malformed run gives its documented one-line error and alters nothing.

The messages are part of the interface and are checked verbatim (regular expressions only
where they quote random start positions).
"""

from __future__ import annotations

import copy
import re
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from chainyard.cli import main
from tests.conftest import GAUSS_MODEL, base_config, tree_snapshot, write_run

Cfg = dict[str, Any]


def _set(path: str, value: Any) -> Callable[[Cfg], None]:
    def edit(cfg: Cfg) -> None:
        *parents, last = path.split(".")
        node: Any = cfg
        for p in parents:
            node = node[int(p)] if p.isdigit() else node[p]
        if value is _DELETE:
            del node[last]
        elif last.isdigit():
            node[int(last)] = value
        else:
            node[last] = value

    return edit


_DELETE = object()

NAN_MODEL = "def log_prob(theta, data):\n    return float('nan')\n"
RAISING_MODEL = "def log_prob(theta, data):\n    raise ZeroDivisionError('tau is zero')\n"
LATE_FAILURE_MODEL = """
calls = 0

def log_prob(theta, data):
    global calls
    calls += 1
    if calls > 2000:
        raise RuntimeError("solver diverged")
    return -0.5 * float(theta @ theta)
"""
MINUS_INF_MODEL = "def log_prob(theta, data):\n    return float('-inf')\n"
BROKEN_MODEL = "def log_prob(theta, data)\n    return 0.0\n"

# (id, edit of the config dict, replacement model source or None, exit code, expected line)
CASES: list[tuple[str, Callable[[Cfg], None] | str, str | None, int, str]] = [
    (
        "missing-model",
        _set("model", _DELETE),
        None,
        2,
        r"run\.yaml: model: required key is missing",
    ),
    (
        "missing-parameters",
        _set("parameters", _DELETE),
        None,
        2,
        r"run\.yaml: parameters: required key is missing",
    ),
    (
        "missing-walkers",
        _set("sampler.walkers", _DELETE),
        None,
        2,
        r"run\.yaml: sampler\.walkers: required key is missing",
    ),
    ("missing-seed", _set("seed", _DELETE), None, 2, r"run\.yaml: seed: required key is missing"),
    (
        "unknown-top-key",
        _set("sead", 7),
        None,
        2,
        r"run\.yaml: sead: unknown key \(check the spelling; see `chainyard schema`\); "
        r"did you mean 'seed'\? allowed: model, parameters, sampler, .*",
    ),
    (
        "unknown-sampler-key",
        _set("sampler.walker", 7),
        None,
        2,
        r"run\.yaml: sampler\.walker: unknown key \(check the spelling; see `chainyard schema`\); "
        r"did you mean 'walkers'\? allowed: kind, walkers, steps, moves, .*",
    ),
    (
        "walkers-not-int",
        _set("sampler.walkers", "many"),
        None,
        2,
        r"run\.yaml: sampler\.walkers = 'many': Input should be a valid integer, unable to parse "
        r"string as an integer",
    ),
    (
        "steps-zero",
        _set("sampler.steps", 0),
        None,
        2,
        r"run\.yaml: sampler\.steps = 0: Input should be greater than or equal to 1",
    ),
    (
        "too-few-walkers",
        _set("sampler.walkers", 3),
        None,
        2,
        r"run\.yaml: sampler\.walkers = 3: must be at least 2 x parameters = 4",
    ),
    (
        "negative-seed",
        _set("seed", -1),
        None,
        2,
        r"run\.yaml: seed = -1: Input should be greater than or equal to 0",
    ),
    (
        "unknown-init",
        _set("parameters.0.init", {"gauss": {"loc": 0, "scale": 1}}),
        None,
        2,
        r"run\.yaml: parameters\[0\]\.init = \{'gauss': \{'loc': 0, 'scale': 1\}\}: must be "
        r"exactly one of \{normal: \{loc, scale\}\} or \{uniform: \{low, high\}\}",
    ),
    (
        "negative-scale",
        _set("parameters.0.init.normal.scale", -1.0),
        None,
        2,
        r"run\.yaml: parameters\[0\]\.init\.normal\.scale = -1\.0: Input should be greater than 0",
    ),
    (
        "uniform-reversed",
        _set("parameters.1.init.uniform.low", 5.0),
        None,
        2,
        r"run\.yaml: parameters\[1\]\.init\.uniform = \{'low': 5\.0, 'high': 1\.0\}: high \(1\.0\) "
        r"must be greater than low \(5\.0\)",
    ),
    (
        "unknown-move",
        _set("sampler.moves", [{"kind": "strech"}]),
        None,
        2,
        r"run\.yaml: sampler\.moves\[0\] = \{'kind': 'strech'\}: Input tag 'strech' found using "
        r"'kind' does not match any of the expected tags: 'stretch', 'walk', "
        r"'differential_evolution', 'de_snooker', 'gaussian'",
    ),
    (
        "stretch-scale",
        _set("sampler.moves", [{"kind": "stretch", "scale": 0.5}]),
        None,
        2,
        r"run\.yaml: sampler\.moves\[0\]\.scale = 0\.5: Input should be greater than 1",
    ),
    (
        "gaussian-sd-length",
        _set("sampler.moves", [{"kind": "gaussian", "proposal_sd": [0.1, 0.2, 0.3]}]),
        None,
        2,
        r"run\.yaml: sampler\.moves\[0\]\.proposal_sd has 3 values; need 1 or 2 \(one per "
        r"parameter\)",
    ),
    (
        "duplicate-names",
        _set("parameters.1.name", "x"),
        None,
        2,
        r"run\.yaml: parameter names must be unique; repeated: x",
    ),
    (
        "bounds-reversed",
        _set("parameters.0.bounds", [2.0, 1.0]),
        None,
        2,
        r"run\.yaml: parameters\[0\]\.bounds = \[2\.0, 1\.0\]: high \(1\.0\) must be greater "
        r"than low \(2\.0\)",
    ),
    (
        "unknown-codec",
        _set("storage", {"codec": "gzip"}),
        None,
        2,
        r"run\.yaml: storage\.codec = 'gzip': Input should be 'pcodec', 'zstd', 'blosc_zstd', "
        r"'lz4' or 'none'",
    ),
    (
        "bad-reference",
        _set("model.log_prob", "model.py"),
        None,
        2,
        r"run\.yaml: model\.log_prob = 'model\.py': must look like 'path/to/module\.py:function' "
        r"or 'package\.module:function'",
    ),
    (
        "model-file-missing",
        _set("model.log_prob", "nomodel.py:log_prob"),
        None,
        2,
        r"run\.yaml: model\.log_prob: model file not found: nomodel\.py",
    ),
    (
        "function-missing",
        _set("model.log_prob", "model.py:nope"),
        None,
        2,
        r"run\.yaml: model\.log_prob: model\.py has no function 'nope'",
    ),
    (
        "module-missing",
        _set("model.log_prob", "no_such_pkg.mod:f"),
        None,
        2,
        r"run\.yaml: model\.log_prob: cannot import module 'no_such_pkg\.mod': "
        r"ModuleNotFoundError: .*",
    ),
    (
        "model-syntax-error",
        lambda cfg: None,
        BROKEN_MODEL,
        2,
        r"run\.yaml: model\.log_prob: importing model\.py failed: SyntaxError: .*",
    ),
    (
        "data-missing",
        _set("model.data", "nodata.csv"),
        None,
        2,
        r"run\.yaml: model\.data: data file not found: nodata\.csv",
    ),
    (
        "data-type",
        _set("model.data", "notes.txt"),
        None,
        2,
        r"run\.yaml: model\.data: notes\.txt: unsupported file type '\.txt'; allowed: \.csv, "
        r"\.npz, \.json, "
        r"or set model\.data_loader",
    ),
    (
        "log-prob-nan",
        lambda cfg: None,
        NAN_MODEL,
        3,
        r"model\.log_prob returned NaN "
        r"at (step \d+, )?(walker \d+|proposal \d+ of \d+) \(x=[-0-9.e]+, y=[-0-9.e]+\)",
    ),
    (
        "log-prob-raises",
        lambda cfg: None,
        RAISING_MODEL,
        3,
        r"model\.log_prob raised ZeroDivisionError: tau is zero "
        r"at (step \d+, )?(walker \d+|proposal \d+ of \d+) \(x=[-0-9.e]+, y=[-0-9.e]+\)",
    ),
    (
        "log-prob-raises-mid-run",
        lambda cfg: None,
        LATE_FAILURE_MODEL,
        3,
        r"model\.log_prob raised RuntimeError: solver diverged "
        r"at (step \d+, )?(walker \d+|proposal \d+ of \d+) \(x=[-0-9.e]+, y=[-0-9.e]+\)",
    ),
    (
        "all-walkers-minus-inf",
        lambda cfg: None,
        MINUS_INF_MODEL,
        2,
        r"run\.yaml: parameters\[\*\]\.init: all walkers start where log_prob is -inf after 100 "
        r"redraws; move "
        r"the starting region inside the model's support \(check init, bounds and the model\)",
    ),
    ("yaml-syntax", "model: [unclosed\n", None, 2, r"run\.yaml: not valid YAML at line 2"),
    (
        "not-a-mapping",
        "- just\n- a list\n",
        None,
        2,
        r"run\.yaml: must be a mapping of settings, got list",
    ),
]


@pytest.fixture(scope="module")
def good_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A finished store made from the minimal config (the bad runs must leave it alone)."""
    folder = tmp_path_factory.mktemp("good")
    cfg = base_config(sampler={"walkers": 16, "steps": 200})
    path = write_run(folder, cfg)
    assert (
        main(["sample", str(path), "--out", str(folder / "store.zarr"), "--progress", "off"]) == 0
    )
    return folder / "store.zarr"


def _bad_run(folder: Path, edit: Callable[[Cfg], None] | str, model: str | None) -> Path:
    if isinstance(edit, str):
        return write_run(folder, edit, model or GAUSS_MODEL, files={"notes.txt": "hi\n"})
    cfg = copy.deepcopy(base_config(sampler={"walkers": 16, "steps": 200}))
    edit(cfg)
    return write_run(folder, cfg, model or GAUSS_MODEL, files={"notes.txt": "hi\n"})


def test_at_least_twenty_cases() -> None:
    """The catalogue holds at least twenty distinct malformed inputs."""
    assert len({c[0] for c in CASES}) >= 20


@pytest.mark.parametrize(
    ("name", "edit", "model", "code", "expected"), CASES, ids=[c[0] for c in CASES]
)
def test_bad_input(
    name: str,
    edit: Callable[[Cfg], None] | str,
    model: str | None,
    code: int,
    expected: str,
    tmp_path: Path,
    good_store: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """One documented error line, the documented exit code, no store made, none altered."""
    path = _bad_run(tmp_path, edit, model)
    out = tmp_path / "new.zarr"
    rc = main(["sample", str(path), "--out", str(out), "--progress", "off"])
    lines = capsys.readouterr().err.strip().splitlines()
    err = [ln for ln in lines if ln.startswith("chainyard: error: ")]
    assert rc == code
    assert len(err) == 1, lines
    assert "Traceback" not in "\n".join(lines)
    line = err[0].removeprefix("chainyard: error: ").replace(f"{tmp_path}/", "")
    assert re.fullmatch(expected, line), err[0]
    assert not out.exists()
    # the same bad input pointed at an existing store leaves every byte as it was
    before = tree_snapshot(good_store)
    rc = main(["sample", str(path), "--out", str(good_store), "--progress", "off"])
    capsys.readouterr()
    assert rc != 0
    assert tree_snapshot(good_store) == before


def test_missing_config_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A config path that does not exist is named in the error."""
    rc = main(["sample", str(tmp_path / "nope.yaml"), "--out", str(tmp_path / "s.zarr")])
    assert rc == 2
    assert capsys.readouterr().err.strip() == (
        f"chainyard: error: {tmp_path / 'nope.yaml'}: config file not found"
    )
