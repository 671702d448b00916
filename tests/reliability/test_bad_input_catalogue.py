"""Bad-input catalogue: every malformed input gives one documented line and its exit status.

Each row is one bad input (config section, data file, path, command line or workflow config),
the command it is given to, the documented exit status and a fragment of the one-line message
(``chainyard: error: ...``). Every case asserts exactly one error line, no traceback, and that
no store was made. The rows run in-process (``chainyard.cli.main``) to stay within the CI time
share; a sample of them runs again through real subprocesses. The rules for data files are
documented in :mod:`chainyard.datafiles`; the exit statuses in :mod:`chainyard.errors`
(2: config, input file or usage; 3: the model; 4: a store path that is not a store).
"""

from __future__ import annotations

import copy
import os
import textwrap
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml

from chainyard.cli import main
from chainyard.errors import ConfigError
from tests.conftest import GAUSS_MODEL, base_config, cli, write_run
from tests.reliability.conftest import Tally

NAN, INF = float("nan"), float("inf")
_DELETE = object()


@dataclass(frozen=True)
class Case:
    """One bad input.

    ``config`` edits the base config (dotted paths; list items by index); ``text`` replaces the
    config file's bytes; ``files`` are written beside it; ``argv`` is the command (``{cfg}``,
    ``{out}`` and ``{dir}`` are filled in), by default ``sample`` and then ``check``.
    """

    id: str
    area: str
    fragment: str
    code: int = 2
    config: dict[str, Any] = field(default_factory=dict)
    text: bytes | None = None
    model: str = GAUSS_MODEL
    files: dict[str, bytes | Callable[[Path], None]] = field(default_factory=dict)
    argv: tuple[str, ...] | None = None
    config_name: str = "run.yaml"


def _edit(cfg: dict[str, Any], path: str, value: Any) -> None:
    *parents, last = path.split(".")
    node: Any = cfg
    for p in parents:
        node = node[int(p)] if p.isdigit() else node.setdefault(p, {})
    key: Any = int(last) if last.isdigit() else last
    if value is _DELETE:
        del node[key]
    else:
        node[key] = value


def C(id: str, area: str, fragment: str, code: int = 2, **changes: Any) -> Case:
    """A config case: ``changes`` maps dotted config paths (``__`` for dots) to new values."""
    model = changes.pop("_model", GAUSS_MODEL)
    files = changes.pop("_files", {})
    return Case(
        id,
        area,
        fragment,
        code,
        config={k.replace("__", "."): v for k, v in changes.items()},
        model=model,
        files=files,
    )


def D(id: str, name: str, content: bytes | Callable[[Path], None], fragment: str) -> Case:
    """A data-file case: ``model.data`` names ``name``, written with ``content``."""
    return Case(id, "data", fragment, config={"model.data": name}, files={name: content})


def T(id: str, text: bytes, fragment: str, area: str = "config file") -> Case:
    """A case whose config file holds exactly ``text``."""
    return Case(id, area, fragment, text=text)


def A(id: str, argv: tuple[str, ...], fragment: str, code: int = 2, **kw: Any) -> Case:
    """A command-line case (a valid run config is written as ``{cfg}``)."""
    return Case(id, kw.pop("area", "cli"), fragment, code, argv=argv, **kw)


def _model(body: str) -> str:
    return textwrap.dedent(body)


def _npz(**arrays: Any) -> Callable[[Path], None]:
    def write(path: Path) -> None:
        np.savez(path, **arrays)

    return write


ONE_PARAM = [{"name": "x", "init": {"normal": {"loc": 0.0, "scale": 1.0}}}]
VECTOR = {"model.vectorized": True}

# fmt: off
CASES: list[Case] = [
    # ------------------------------------------------------------------ model section
    C("model-missing", "model", "model: required key is missing", model=_DELETE),
    C("model-not-mapping", "model", "model = 'model.py:log_prob': Input should be a valid dict",
      model="model.py:log_prob"),
    C("model-unknown-key", "model", "model.logprob: unknown key", model__logprob="x"),
    C("log-prob-missing", "model", "model.log_prob: required key is missing",
      model__log_prob=_DELETE),
    C("log-prob-no-colon", "model", "model.log_prob = 'model.py': must look like",
      model__log_prob="model.py"),
    C("log-prob-bad-name", "model", "must look like 'path/to/module.py:function'",
      model__log_prob="model.py:1st"),
    C("log-prob-not-string", "model", "model.log_prob = 5: Input should be a valid string",
      model__log_prob=5),
    C("model-file-missing", "model", "model.log_prob: model file not found:",
      model__log_prob="nomodel.py:log_prob"),
    C("model-file-directory", "model", "is a directory; expected a Python file",
      model__log_prob="sub.py:log_prob", _files={"sub.py/keep": b""}),
    C("function-missing", "model", "model.py has no function 'nope'",
      model__log_prob="model.py:nope"),
    C("function-not-callable", "model", "model.py:log_prob is not callable",
      _model="log_prob = 5\n"),
    C("module-missing", "model", "cannot import module 'no_such_pkg.mod': ModuleNotFoundError",
      model__log_prob="no_such_pkg.mod:f"),
    C("model-syntax-error", "model", "failed: SyntaxError", _model="def log_prob(t, d)\n"),
    C("model-import-raises", "model", "failed: ValueError: no calibration table",
      _model="raise ValueError('no calibration table')\n"),
    C("model-import-exit-0", "model", "failed: SystemExit(0); user code must not exit",
      _model="import sys\nsys.exit(0)\n"),
    C("model-import-exit-3", "model", "failed: SystemExit(3); user code must not exit",
      _model="import sys\nsys.exit(3)\n"),
    C("model-import-keyboard", "model", "KeyboardInterrupt; user code must not raise",
      _model="raise KeyboardInterrupt\n"),
    C("model-import-generator-exit", "model", "failed: GeneratorExit",
      _model="raise GeneratorExit\n"),
    C("model-import-multiline", "model", "failed: RuntimeError: first second",
      _model="raise RuntimeError('first\\nsecond')\n"),
    C("loader-without-data", "model", "model.data_loader: set but model.data is not",
      model__data_loader="model.py:load"),
    C("loader-bad-ref", "model", "model.data_loader = 'loader': must look like",
      model__data_loader="loader"),
    C(
        "loader-raises",
        "model",
        "model.data_loader: failed on",
        model__data="d.txt",
        model__data_loader="model.py:load",
        _files={"d.txt": b"1\n"},
        _model=GAUSS_MODEL + "\ndef load(path):\n    raise OSError('tape not mounted')\n",
    ),
    C(
        "loader-exits",
        "model",
        "SystemExit(1); user code must not exit",
        model__data="d.txt",
        model__data_loader="model.py:load",
        _files={"d.txt": b"1\n"},
        _model=GAUSS_MODEL + "\ndef load(path):\n    raise SystemExit(1)\n",
    ),
    C("extra-source-missing", "model", "model.extra_sources[0] = 'helper.py': file not found:",
      model__extra_sources=["helper.py"]),
    C("extra-source-directory", "model", "model.extra_sources[0] = 'lib': ",
      model__extra_sources=["lib"], _files={"lib/keep": b""}),
    C("extra-sources-not-list", "model", "model.extra_sources = 5: Input should be a list",
      model__extra_sources=5),
    C("vectorized-not-bool", "model", "model.vectorized = 'maybe': Input should be a valid bool",
      model__vectorized="maybe"),
    C(
        "time-limit-zero",
        "model",
        "model.call_time_limit_seconds = 0: Input should be greater than 0",
        model__call_time_limit_seconds=0,
    ),
    C("time-limit-negative", "model", "model.call_time_limit_seconds = -1: Input should be",
      model__call_time_limit_seconds=-1),
    C("time-limit-nan", "model", "model.call_time_limit_seconds = nan: Input should be a finite",
      model__call_time_limit_seconds=NAN),
    C("time-limit-bool", "model", "model.call_time_limit_seconds = 'true': Input should be",
      model__call_time_limit_seconds=True),
    C("check-deterministic-not-bool", "model", "model.check_deterministic = 'sometimes'",
      model__check_deterministic="sometimes"),
    # the model's answers at the initial positions (exit 3)
    C("returns-none", "model output", "model.log_prob returned None at walker 0",
      3, _model="def log_prob(t, d):\n    return None\n"),
    C("returns-string", "model output", "returned str '1.5' at walker 0",
      3, _model="def log_prob(t, d):\n    return '1.5'\n"),
    C("returns-complex", "model output", "returned a complex number (1+2j)",
      3, _model="def log_prob(t, d):\n    return 1 + 2j\n"),
    C("returns-array-1", "model output", "returned an array of shape (1,)",
      3, _model="import numpy as np\ndef log_prob(t, d):\n    return np.array([0.0])\n"),
    C("returns-bool", "model output", "returned a bool (True)",
      3, _model="def log_prob(t, d):\n    return True\n"),
    C("returns-nan", "model output", "model.log_prob returned NaN at walker 0",
      3, _model="def log_prob(t, d):\n    return float('nan')\n"),
    C("returns-plus-inf", "model output", "model.log_prob returned +inf at walker 0",
      3, _model="def log_prob(t, d):\n    return float('inf')\n"),
    C(
        "vectorized-16x1",
        "model output",
        "(vectorized) returned shape (16, 1) for 16 walkers",
        3,
        **VECTOR,
        _model="import numpy as np\ndef log_prob(t, d):\n    return np.zeros((len(t), 1))\n",
    ),
    C(
        "vectorized-2x16",
        "model output",
        "(vectorized) returned shape (2, 16)",
        3,
        **VECTOR,
        _model="import numpy as np\ndef log_prob(t, d):\n    return np.zeros((2, len(t)))\n",
    ),
    C("vectorized-scalar", "model output", "(vectorized) returned a single value (0.0)",
      3, **VECTOR, _model="def log_prob(t, d):\n    return 0.0\n"),
    C("vectorized-short-list", "model output", "(vectorized) returned shape (3,)",
      3, **VECTOR, _model="def log_prob(t, d):\n    return [0.0, 0.0, 0.0]\n"),
    C(
        "vectorized-complex",
        "model output",
        "returned values of dtype complex128",
        3,
        **VECTOR,
        _model="import numpy as np\ndef log_prob(t, d):\n    return np.zeros(len(t), complex)\n",
    ),
    C(
        "vectorized-object",
        "model output",
        "returned values of dtype object",
        3,
        **VECTOR,
        _model="import numpy as np\ndef log_prob(t, d):\n    return np.array([None] * len(t))\n",
    ),
    C("vectorized-none", "model output", "(vectorized) returned None",
      3, **VECTOR, _model="def log_prob(t, d):\n    return None\n"),
    C("call-exits-0", "model output", "raised SystemExit(0) at walker 0",
      3, _model="import sys\ndef log_prob(t, d):\n    sys.exit(0)\n"),
    C("call-keyboard-interrupt", "model output", "raised KeyboardInterrupt at walker 0",
      3, _model="def log_prob(t, d):\n    raise KeyboardInterrupt\n"),
    C("blob-not-number", "model output", "returned str 'hot' for blob 'energy'",
      3, sampler__blobs=["energy"], _model="def log_prob(t, d):\n    return 0.0, 'hot'\n"),
    C("blob-missing", "model output", "returned 0.0 at walker 0",
      3, sampler__blobs=["energy"], _model="def log_prob(t, d):\n    return 0.0\n"),
    # ------------------------------------------------------------------ parameters
    C("parameters-missing", "parameters", "parameters: required key is missing",
      parameters=_DELETE),
    C("parameters-empty", "parameters", "parameters: at least one parameter is required",
      parameters=[]),
    C("parameters-mapping", "parameters", "parameters = {'x': 1}: Input should be a list",
      parameters={"x": 1}),
    C("parameter-name-missing", "parameters", "parameters[0].name: required key is missing",
      parameters__0__name=_DELETE),
    C("parameter-name-digit", "parameters", "name = '1x': a name starts with a letter or '_'",
      parameters__0__name="1x"),
    C("parameter-name-slash", "parameters", "name = 'a/b': a name starts with a letter",
      parameters__0__name="a/b"),
    C("parameter-name-duplicate", "parameters", "parameter names must be unique; repeated: x",
      parameters__1__name="x"),
    C("parameter-unknown-key", "parameters", "parameters[0].prior: unknown key",
      parameters__0__prior="flat"),
    C("init-missing", "parameters", "parameters without 'init' (and no sampler.initial_pos",
      parameters__0__init=_DELETE),
    C("init-unknown-kind", "parameters", "must be exactly one of {normal: {loc, scale}} or",
      parameters__0__init={"gauss": {"loc": 0, "scale": 1}}),
    C("init-two-kinds", "parameters", "must be exactly one of {normal",
      parameters__0__init={"normal": {"loc": 0, "scale": 1}, "uniform": {"low": 0, "high": 1}}),
    C("init-not-mapping", "parameters", "parameters[0].init.normal = 5: Input should be a valid",
      parameters__0__init={"normal": 5}),
    C(
        "normal-loc-nan",
        "parameters",
        "parameters[0].init.normal.loc = nan: Input should be a finite number",
        parameters__0__init__normal__loc=NAN,
    ),
    C("normal-loc-inf", "parameters", "parameters[0].init.normal.loc = inf: Input should be a",
      parameters__0__init__normal__loc=INF),
    C("normal-loc-text", "parameters", "parameters[0].init.normal.loc = 'zero'",
      parameters__0__init__normal__loc="zero"),
    C(
        "normal-scale-zero",
        "parameters",
        "parameters[0].init.normal.scale = 0.0: Input should be greater than 0",
        parameters__0__init__normal__scale=0.0,
    ),
    C("normal-scale-negative", "parameters", "normal.scale = -1.0: Input should be greater",
      parameters__0__init__normal__scale=-1.0),
    C("normal-scale-nan", "parameters", "normal.scale = nan: Input should be a finite number",
      parameters__0__init__normal__scale=NAN),
    C("normal-scale-missing", "parameters", "parameters[0].init.normal.scale: required key",
      parameters__0__init__normal__scale=_DELETE),
    C("uniform-reversed", "parameters", "high (1.0) must be greater than low (5.0)",
      parameters__1__init__uniform__low=5.0),
    C("uniform-equal", "parameters", "high (1.0) must be greater than low (1.0)",
      parameters__1__init__uniform__low=1.0),
    C("uniform-low-nan", "parameters", "init.uniform.low = nan: Input should be a finite",
      parameters__1__init__uniform__low=NAN),
    C("uniform-high-inf", "parameters", "init.uniform.high = inf: Input should be a finite",
      parameters__1__init__uniform__high=INF),
    C("uniform-high-missing", "parameters", "init.uniform.high: required key is missing",
      parameters__1__init__uniform__high=_DELETE),
    C("bounds-reversed", "parameters", "bounds = [2.0, 1.0]: high (1.0) must be greater than",
      parameters__0__bounds=[2.0, 1.0]),
    C("bounds-nan", "parameters", "NaN is not a bound; use a number, or null for an open side",
      parameters__0__bounds=[NAN, None]),
    C("bounds-three", "parameters", "bounds = [0, 1, 2]: List should have at most 2 items, not 3",
      parameters__0__bounds=[0, 1, 2]),
    C("bounds-text", "parameters", "parameters[0].bounds = 'positive': Input should be a list",
      parameters__0__bounds="positive"),
    C("bounds-low-plus-inf", "parameters", "must be greater than low (inf)",
      parameters__0__bounds=[INF, 5.0]),
    C("unit-not-text", "parameters", "parameters[0].unit = 5: Input should be a valid string",
      parameters__0__unit=5),
    C("start-outside-bounds", "parameters", "all walkers start where log_prob is -inf",
      2, parameters__0__bounds=[10.0, None]),
    # ------------------------------------------------------------------ sampler
    C("sampler-missing", "sampler", "sampler: required key is missing", sampler=_DELETE),
    C("sampler-unknown-key", "sampler", "sampler.walker: unknown key", sampler__walker=16),
    C("walkers-missing", "sampler", "sampler.walkers: required key is missing",
      sampler__walkers=_DELETE),
    C("walkers-text", "sampler", "sampler.walkers = 'many': Input should be a valid integer",
      sampler__walkers="many"),
    C("walkers-fraction", "sampler", "sampler.walkers = 15.5: Input should be a valid integer",
      sampler__walkers=15.5),
    C("walkers-bool", "sampler", "sampler.walkers = 'true': Input should be a valid integer",
      sampler__walkers=True),
    C("walkers-too-few", "sampler", "sampler.walkers = 3: must be at least 2 x parameters = 4",
      sampler__walkers=3),
    C("walkers-zero", "sampler", "sampler.walkers = 0: Input should be greater than or equal",
      sampler__walkers=0),
    C("steps-zero", "sampler", "sampler.steps = 0: Input should be greater than or equal to 1",
      sampler__steps=0),
    C("steps-negative", "sampler", "sampler.steps = -5: Input should be greater than or equal",
      sampler__steps=-5),
    C("steps-missing", "sampler", "sampler.steps: required key is missing", sampler__steps=_DELETE),
    C("steps-nan", "sampler", "sampler.steps = nan:", sampler__steps=NAN),
    C("moves-empty", "sampler", "sampler.moves: at least one move is required", sampler__moves=[]),
    C("move-unknown-kind", "sampler", "Input tag 'strech' found using 'kind' does not match",
      sampler__moves=[{"kind": "strech"}]),
    C("move-kind-missing", "sampler", "sampler.moves[0].kind: required key is missing",
      sampler__moves=[{"scale": 3.0}]),
    C("move-unknown-key", "sampler", "sampler.moves[0].sigma: unknown key",
      sampler__moves=[{"kind": "stretch", "sigma": 1.0}]),
    C("move-weight-zero", "sampler", "sampler.moves[0].weight = 0: Input should be greater",
      sampler__moves=[{"kind": "stretch", "weight": 0}]),
    C("move-weight-negative", "sampler", "sampler.moves[1].weight = -1: Input should be",
      sampler__moves=[{"kind": "stretch"}, {"kind": "walk", "weight": -1}]),
    C("move-weight-inf", "sampler", "sampler.moves[0].weight = inf: Input should be a finite",
      sampler__moves=[{"kind": "stretch", "weight": INF}]),
    C("stretch-scale-below-1", "sampler", "sampler.moves[0].scale = 0.5: Input should be",
      sampler__moves=[{"kind": "stretch", "scale": 0.5}]),
    C("stretch-scale-nan", "sampler", "sampler.moves[0].scale = nan: Input should be a finite",
      sampler__moves=[{"kind": "stretch", "scale": NAN}]),
    C("walk-subset-one", "sampler", "sampler.moves[0].subset_size = 1: Input should be",
      sampler__moves=[{"kind": "walk", "subset_size": 1}]),
    C(
        "walk-subset-too-big",
        "sampler",
        "sampler.moves[0].subset_size = 9: at most walkers // 2 = 8",
        sampler__moves=[{"kind": "walk", "subset_size": 9}],
    ),
    C("de-jitter-negative", "sampler", "sampler.moves[0].jitter = -1.0: Input should be",
      sampler__moves=[{"kind": "differential_evolution", "jitter": -1.0}]),
    C("de-step-factor-zero", "sampler", "sampler.moves[0].step_factor = 0: Input should be",
      sampler__moves=[{"kind": "differential_evolution", "step_factor": 0}]),
    C(
        "de-too-few-walkers",
        "sampler",
        "sampler.moves[0] (differential_evolution) needs at least 4 walkers",
        parameters=ONE_PARAM,
        sampler__walkers=3,
        sampler__moves=[{"kind": "differential_evolution"}],
    ),
    C("snooker-step-factor-negative", "sampler", "sampler.moves[0].step_factor = -1.7",
      sampler__moves=[{"kind": "de_snooker", "step_factor": -1.7}]),
    C("snooker-too-few-walkers", "sampler", "(de_snooker) needs at least 4 walkers",
      parameters=ONE_PARAM, sampler__walkers=2, sampler__moves=[{"kind": "de_snooker"}]),
    C("gaussian-sd-missing", "sampler", "sampler.moves[0].proposal_sd: required key",
      sampler__moves=[{"kind": "gaussian"}]),
    C(
        "gaussian-sd-negative",
        "sampler",
        "sampler.moves[0].proposal_sd = -0.1: must be a positive finite number",
        sampler__moves=[{"kind": "gaussian", "proposal_sd": -0.1}],
    ),
    C("gaussian-sd-zero", "sampler", "proposal_sd = 0: must be a positive finite number",
      sampler__moves=[{"kind": "gaussian", "proposal_sd": 0}]),
    C("gaussian-sd-one-negative", "sampler", "proposal_sd = [0.1, -0.2]: must be a positive",
      sampler__moves=[{"kind": "gaussian", "proposal_sd": [0.1, -0.2]}]),
    C("gaussian-sd-nan", "sampler", "proposal_sd = nan: must be a positive finite number",
      sampler__moves=[{"kind": "gaussian", "proposal_sd": NAN}]),
    C("gaussian-sd-text", "sampler", "proposal_sd = 'big': must be a positive finite number",
      sampler__moves=[{"kind": "gaussian", "proposal_sd": "big"}]),
    C("gaussian-sd-empty", "sampler", "proposal_sd = []: must be a positive finite number",
      sampler__moves=[{"kind": "gaussian", "proposal_sd": []}]),
    C("gaussian-sd-length", "sampler", "proposal_sd has 3 values; need 1 or 2 (one per param",
      sampler__moves=[{"kind": "gaussian", "proposal_sd": [0.1, 0.2, 0.3]}]),
    C("gaussian-update-unknown", "sampler", "sampler.moves[0].update = 'diagonal': Input should",
      sampler__moves=[{"kind": "gaussian", "proposal_sd": 0.1, "update": "diagonal"}]),
    C("blobs-duplicate", "sampler", "sampler.blobs must be unique; repeated: e",
      sampler__blobs=["e", "e"]),
    C("blob-name-slash", "sampler", "sampler.blobs[0] = 'a/b': a name starts with a letter",
      sampler__blobs=["a/b"]),
    C("blobs-not-list", "sampler", "sampler.blobs = 5: Input should be a list", sampler__blobs=5),
    C("init-retries-negative", "sampler", "sampler.init_retries = -1: Input should be greater",
      sampler__init_retries=-1),
    C("initial-positions-missing", "sampler", "sampler.initial_positions: file not found",
      sampler__initial_positions="start.npy"),
    C("initial-positions-type", "sampler", "start.txt: unsupported type; allowed: .npy, .csv",
      sampler__initial_positions="start.txt", _files={"start.txt": b"1\n"}),
    C(
        "initial-positions-shape",
        "sampler",
        "start.npy has shape (3, 2); need (walkers, params)",
        sampler__initial_positions="start.npy",
        _files={"start.npy": lambda p: np.save(p, np.zeros((3, 2)))},
    ),
    # ------------------------------------------------------------------ storage
    C("storage-unknown-key", "storage", "storage.chunk: unknown key", storage__chunk=10),
    C("chunk-steps-zero", "storage", "storage.chunk_steps = 0: Input should be greater",
      storage__chunk_steps=0),
    C(
        "chunk-steps-huge",
        "storage",
        "storage.chunk_steps = 1,000,000,000: one chunk would hold 1,000,000,000 steps x 16 "
        "walkers x 4 values x 8 bytes",
        storage__chunk_steps=10**9,
    ),
    C("chunk-steps-huge-float", "storage", "above the chunk_bytes limit of",
      storage__chunk_steps=1.0e9),
    C("chunk-steps-text-exponent", "storage", "storage.chunk_steps = '1e9': Input should be",
      storage__chunk_steps="1e9"),
    C("commit-steps-zero", "storage", "storage.commit_every_steps = 0: Input should be",
      storage__commit_every_steps=0),
    C("commit-seconds-zero", "storage", "storage.commit_every_seconds = 0: Input should be",
      storage__commit_every_seconds=0),
    C("commit-seconds-inf", "storage", "storage.commit_every_seconds = inf: Input should be a",
      storage__commit_every_seconds=INF),
    C("commit-seconds-nan", "storage", "storage.commit_every_seconds = nan: Input should be a",
      storage__commit_every_seconds=NAN),
    C("codec-unknown", "storage", "storage.codec = 'gzip': Input should be 'pcodec'",
      storage__codec="gzip"),
    C("level-too-high", "storage", "storage.level = 30: Input should be less than or equal",
      storage__level=30),
    C("level-pcodec", "storage", "level = 13: codec 'pcodec' allows levels 0-12",
      storage__level=13),
    C("level-lz4", "storage", "level = 10: codec 'lz4' allows levels 0-9",
      storage__codec="lz4", storage__level=10),
    C("level-none", "storage", "level = 3: codec 'none' takes no level (use null)",
      storage__codec="none", storage__level=3),
    C("fsync-not-bool", "storage", "storage.fsync = 'maybe': Input should be a valid boolean",
      storage__fsync="maybe"),
    C("writer-unknown", "storage", "storage.commit_writer = 'fork': Input should be 'auto'",
      storage__commit_writer="fork"),
    # ------------------------------------------------------------------ seed and replicas
    C("seed-missing", "seed", "seed: required key is missing", seed=_DELETE),
    C("seed-negative", "seed", "seed = -1: Input should be greater than or equal to 0", seed=-1),
    C("seed-fraction", "seed", "seed = 1.5: Input should be a valid integer", seed=1.5),
    C("seed-text", "seed", "seed = 'abc': Input should be a valid integer", seed="abc"),
    C("seed-bool", "seed", "seed = 'true': Input should be a valid integer", seed=True),
    C("seed-nan", "seed", "seed = nan:", seed=NAN),
    C("replicas-zero", "replicas", "replicas = 0: Input should be greater than or equal to 1",
      replicas=0),
    C("replicas-text", "replicas", "replicas = 'two': Input should be a valid integer",
      replicas="two"),
    C("description-not-text", "replicas", "description = 5: Input should be a valid string",
      description=5),
    # ------------------------------------------------------------------ burn-in, thinning, targets
    C("burn-in-unknown-policy", "policies", "Input tag 'fancy' found using 'policy'",
      burn_in={"policy": "fancy"}),
    C("burn-in-policy-missing", "policies", "burn_in.policy: required key is missing",
      burn_in={"steps": 3}),
    C("burn-in-not-mapping", "policies", "burn_in = 5: Input should be a valid dictionary",
      burn_in=5),
    C("burn-in-fixed-negative", "policies", "burn_in.steps = -1: Input should be greater",
      burn_in={"policy": "fixed", "steps": -1}),
    C("burn-in-fixed-missing", "policies", "burn_in.steps: required key is missing",
      burn_in={"policy": "fixed"}),
    C("burn-in-fraction-one", "policies", "burn_in.fraction = 1.0: Input should be less than 1",
      burn_in={"policy": "fraction", "fraction": 1.0}),
    C("burn-in-fraction-nan", "policies", "burn_in.fraction = nan: Input should be a finite",
      burn_in={"policy": "fraction", "fraction": NAN}),
    C("burn-in-tau-zero", "policies", "burn_in.multiple = 0: Input should be greater than 0",
      burn_in={"policy": "tau_multiple", "multiple": 0}),
    C("burn-in-mser-batch", "policies", "burn_in.batch_size = 0: Input should be greater",
      burn_in={"policy": "mser", "batch_size": 0}),
    C("burn-in-geweke-z", "policies", "burn_in.z_crit = -1: Input should be greater than 0",
      burn_in={"policy": "geweke", "z_crit": -1}),
    C("burn-in-default-fraction", "policies", "burn_in.max_fraction = 1.5: Input should be",
      burn_in={"policy": "default", "max_fraction": 1.5}),
    C("burn-in-unknown-key", "policies", "burn_in.step: unknown key",
      burn_in={"policy": "fixed", "steps": 1, "step": 1}),
    C("thinning-unknown-policy", "policies", "Input tag 'every' found using 'policy'",
      thinning={"policy": "every"}),
    C("thinning-fixed-zero", "policies", "thinning.factor = 0: Input should be greater",
      thinning={"policy": "fixed", "factor": 0}),
    C("thinning-tau-zero", "policies", "thinning.fraction = 0: Input should be greater than 0",
      thinning={"policy": "tau", "fraction": 0}),
    C("thinning-draws-zero", "policies", "thinning.draws = 0: Input should be greater",
      thinning={"policy": "target_draws", "draws": 0}),
    C("thinning-cost-negative", "policies", "thinning.cost_ratio = -2: Input should be greater",
      thinning={"policy": "cost_aware", "cost_ratio": -2}),
    C("thinning-none-extra", "policies", "thinning.factor: unknown key",
      thinning={"policy": "none", "factor": 2}),
    C("targets-unknown-key", "policies", "targets.min_ess: unknown key", targets={"min_ess": 100}),
    C("targets-ess-negative", "policies", "targets.min_ess_bulk = -1: Input should be greater",
      targets={"min_ess_bulk": -1}),
    C("targets-ess-inf", "policies", "targets.min_ess_tail = inf: Input should be a finite",
      targets={"min_ess_tail": INF}),
    C("targets-precision-one", "policies", "targets.relative_precision = 1.5: Input should be",
      targets={"relative_precision": 1.5}),
    C("targets-not-mapping", "policies", "targets = 'strict': Input should be a valid dict",
      targets="strict"),
    C("extend-max-steps-missing", "policies", "extend_until_targets.max_steps: required key",
      extend_until_targets={"check_every": 100}),
    C("extend-check-zero", "policies", "extend_until_targets.check_every = 0: Input should",
      extend_until_targets={"check_every": 0, "max_steps": 500}),
    C("extend-seconds-negative", "policies", "extend_until_targets.max_seconds = -1: Input",
      extend_until_targets={"max_seconds": -1, "max_steps": 500}),
    C("extend-unknown-key", "policies", "extend_until_targets.budget: unknown key",
      extend_until_targets={"budget": 5, "max_steps": 500}),
    C("unknown-top-key", "policies", "sead: unknown key (check the spelling", sead=7),
    # ------------------------------------------------------------------ data files
    D("csv-duplicate-columns", "d.csv", b"x,y,x\n1,2,3\n",
      "column name 'x' appears twice (columns 1 and 3); column names must be unique"),
    D("csv-header-only", "d.csv", b"x,y\n", "d.csv: has a header but no data rows"),
    D("csv-empty", "d.csv", b"", "d.csv: is empty (a header row is required)"),
    D("csv-blank-lines-only", "d.csv", b"\n\n", "is empty (a header row is required)"),
    D("csv-ragged-long", "d.csv", b"x,y\n1,2\n3,4,5\n",
      "line 3 has 3 fields; the header has 2 (x, y)"),
    D("csv-ragged-short", "d.csv", b"x,y\n1,2\n3\n", "line 3 has 1 fields; the header has 2"),
    D("csv-not-a-number", "d.csv", b"x,y\n1,2\n3,n/a\n",
      "column 'y', line 3: 'n/a' is not a finite number"),
    D("csv-empty-cell", "d.csv", b"x,y\n1,2\n3,\n",
      "column 'y', line 3: an empty cell is not a finite number"),
    D("csv-nan-cell", "d.csv", b"x\n1\nnan\n", "column 'x', line 3: 'nan' is not a finite"),
    D("csv-inf-cell", "d.csv", b"x\ninf\n2\n", "column 'x', line 2: 'inf' is not a finite"),
    D("csv-utf8-bom", "d.csv", b"\xef\xbb\xbfx,y\n1,2\n",
      "starts with a UTF-8 byte-order mark; expected UTF-8 text without one"),
    D("csv-utf16", "d.csv", "x,y\n1,2\n".encode("utf-16"),
      "starts with a UTF-16 byte-order mark; expected UTF-8"),
    D("csv-latin1", "d.csv", b"site,y\nZ\xfcrich,2\n",
      "is not UTF-8 text (byte 0xfc at line 2); expected UTF-8"),
    D("csv-nul-bytes", "d.csv", b"x,y\n1,\x002\n", "holds NUL bytes; expected CSV text"),
    D("csv-unnamed-column", "d.csv", b"x,\n1,2\n", "column 2 of the header has no name"),
    D("csv-bad-quoting", "d.csv", b'x,y\n1,"2"3\n', "not valid CSV at line 2"),
    D("csv-mixed-label-column", "d.csv", b"site,y\n7,1\nA1,2\n",
      "column 'site', line 3: 'A1' is not a finite number"),
    D("npz-object-array", "d.npz", _npz(a=np.array([{"k": 1}], dtype=object)),
      "array 'a' holds Python objects (dtype object)"),
    D("npz-not-zip", "d.npz", b"not a zip", "is not an .npz archive"),
    D("npz-empty", "d.npz", _npz(), "holds no arrays"),
    D("json-nan", "d.json", b'{"y": [1.0, NaN]}', "NaN at line 1 is not valid JSON"),
    D("json-infinity", "d.json", b'{"note": "NaN",\n "y": [1.0, -Infinity]}',
      "-Infinity at line 2 is not valid JSON (RFC 8259 has no NaN or Infinity)"),
    D("json-overflow", "d.json", b'{"y": [1.0,\n 1e400]}',
      "number 1e400 at line 2 is too large for a 64-bit float"),
    D("json-invalid", "d.json", b'{"y": [1.0, 2.0}', "not valid JSON at line 1"),
    D("json-not-utf8", "d.json", b'{"site": "Z\xfcrich"}', "is not UTF-8 text (byte 0xfc"),
    D("data-unsupported-type", "d.txt", b"1 2 3\n",
      "d.txt: unsupported file type '.txt'; allowed: .csv, .npz, .json, or set"),
    C("data-missing", "data", "model.data: data file not found:", model__data="nodata.csv"),
    C("data-directory", "data", "is a directory; expected a data file",
      model__data="d.csv", _files={"d.csv/keep": b""}),
    C("data-not-text", "data", "model.data = 5: Input should be a valid string", model__data=5),
    # ------------------------------------------------------------------ config file itself
    T(
        "config-latin1",
        b"seed: 1\n# caf\xe9\n",
        "is not UTF-8 text (byte 0xe9 at line 2); save the config file as UTF-8",
    ),
    T("config-utf16", "seed: 1\n".encode("utf-16"), "is UTF-16 text; save the config file"),
    T(
        "config-binary",
        b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR",
        "is a binary file (it holds NUL bytes), not a YAML config file",
    ),
    T("config-empty", b"", "the config is empty; it needs at least model, parameters"),
    T("config-comments-only", b"# nothing yet\n", "the config is empty"),
    T("config-list", b"- just\n- a list\n", "must be a mapping of settings, got list"),
    T("config-scalar", b"42\n", "must be a mapping of settings, got int"),
    T("config-string", b"hello\n", "must be a mapping of settings, got str"),
    T("config-yaml-syntax", b"model: [unclosed\n", "not valid YAML at line 2"),
    T("config-tab-indent", b"model:\n\tlog_prob: model.py:log_prob\n", "not valid YAML at line"),
    T("config-two-documents", b"seed: 1\n---\nseed: 2\n", "holds more than one YAML document"),
    T(
        "config-duplicate-top-key",
        yaml.safe_dump(base_config(), sort_keys=False).encode() + b"seed: 8\n",
        "key 'seed' appears twice in one mapping (first at line",
    ),
    T(
        "config-duplicate-nested-key",
        b"model: {log_prob: model.py:log_prob}\nparameters:\n  - name: x\n"
        b"    init: {normal: {loc: 0.0, scale: 1.0, loc: 2.0}}\n"
        b"sampler: {walkers: 16, steps: 20}\nseed: 1\n",
        "line 4: key 'loc' appears twice in one mapping",
    ),
    T(
        "config-python-tag",
        b"seed: !!python/object/apply:os.system ['true']\n",
        "not valid YAML at line 1: could not determine a constructor for the tag",
    ),
    # ------------------------------------------------------------------ paths
    A(
        "config-missing",
        ("sample", "{dir}/nope.yaml", "--out", "{out}"),
        "nope.yaml: config file not found",
        area="paths",
    ),
    A(
        "config-is-directory",
        ("sample", "{dir}", "--out", "{out}"),
        "is a directory; expected a YAML config file",
        area="paths",
    ),
    A(
        "config-under-a-file",
        ("check", "{cfg}/run.yaml"),
        "cannot read config file (Not a directory)",
        area="paths",
    ),
    A("config-dangling-symlink", ("check", "{dir}/link.yaml"), "link.yaml: config file not found",
      area="paths", files={"link.yaml": lambda p: p.symlink_to(p.parent / "gone.yaml")}),
    A(
        "out-is-a-file",
        ("sample", "{cfg}", "--out", "{dir}/notes.txt"),
        "exists and is a file, not a store directory",
        4,
        area="paths",
        files={"notes.txt": b"my notes\n"},
    ),
    A("out-is-a-folder", ("sample", "{cfg}", "--out", "{dir}/mine"), "mine",
      4, area="paths", files={"mine/thesis.tex": b"x\n"}),
    C("model-relative-to-config", "paths", "model file not found: ",
      model__log_prob="../elsewhere/model.py:log_prob"),
    C("data-relative-to-config", "paths", "data file not found: ",
      model__data="sub/d.csv", _files={"../sub/d.csv": b"x\n1\n"}),
    # ------------------------------------------------------------------ command line
    A("no-command", (), "the following arguments are required: COMMAND"),
    A("unknown-command", ("frob",), "argument COMMAND: invalid choice: 'frob'"),
    A(
        "unknown-option",
        ("sample", "{cfg}", "--out", "{out}", "--stepz", "3"),
        "unrecognized arguments: --stepz 3",
    ),
    A(
        "steps-zero-option",
        ("sample", "{cfg}", "--out", "{out}", "--steps", "0"),
        "argument --steps: must be >= 1, got 0",
    ),
    A(
        "steps-negative-option",
        ("sample", "{cfg}", "--out", "{out}", "--steps", "-5"),
        "argument --steps",
    ),
    A(
        "steps-text-option",
        ("sample", "{cfg}", "--out", "{out}", "--steps", "abc"),
        "argument --steps: must be a whole number >= 1, got 'abc'",
    ),
    A(
        "steps-float-option",
        ("sample", "{cfg}", "--out", "{out}", "--steps", "1.5"),
        "argument --steps",
    ),
    A(
        "replica-negative",
        ("sample", "{cfg}", "--out", "{out}", "--replica", "-1"),
        "argument --replica: must be >= 0, got -1",
    ),
    A(
        "replica-text",
        ("sample", "{cfg}", "--out", "{out}", "--replica", "x"),
        "argument --replica",
    ),
    A(
        "progress-unknown",
        ("sample", "{cfg}", "--out", "{out}", "--progress", "fancy"),
        "argument --progress: invalid choice: 'fancy'",
    ),
    A("sample-no-arguments", ("sample",), "the following arguments are required: config, --out"),
    A("sample-no-out", ("sample", "{cfg}"), "the following arguments are required: --out"),
    A("check-no-config", ("check",), "the following arguments are required: config"),
    A("check-two-configs", ("check", "{cfg}", "{cfg}"), "unrecognized arguments"),
    A("diagnose-no-stores", ("diagnose",), "the following arguments are required: stores"),
    A("derive-no-out", ("derive", "{out}"), "the following arguments are required: --out"),
    A(
        "decide-unknown-what",
        ("decide", "burnin", "{out}", "--out", "{dir}/r.json"),
        "argument what: invalid choice: 'burnin'",
    ),
    A("schema-unknown-option", ("schema", "--bogus"), "unrecognized arguments: --bogus"),
]
# fmt: on

_SUBPROCESS_SAMPLE = (
    "normal-loc-nan",
    "chunk-steps-huge",
    "csv-ragged-long",
    "config-latin1",
    "model-import-exit-0",
    "steps-zero-option",
)


def _setup(case: Case, folder: Path) -> list[str]:
    """Write the case's inputs into ``folder``; return the command line."""
    if case.text is not None:
        cfg = write_run(folder, "", case.model, name=case.config_name)
        cfg.write_bytes(case.text)
    else:
        data = copy.deepcopy(base_config(sampler={"walkers": 16, "steps": 200}))
        for key, value in case.config.items():
            _edit(data, key, value)
        cfg = write_run(folder, data, case.model, name=case.config_name)
    for name, content in case.files.items():
        path = folder / name
        path.parent.mkdir(parents=True, exist_ok=True)
        if callable(content):
            content(path)
        else:
            path.write_bytes(content)
    argv = (
        case.argv
        if case.argv is not None
        else ("sample", "{cfg}", "--out", "{out}", "--progress", "off")
    )
    out = folder / "new.zarr"
    return [a.format(cfg=cfg, out=out, dir=folder) for a in argv]


def _run_in_process(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str]:
    capsys.readouterr()
    try:
        code = main(argv)
    except SystemExit as exc:  # argparse usage errors
        code = int(exc.code or 0)
    return code, capsys.readouterr().err


def _assert_one_line(err: str, code: int, case: Case, got: int) -> str:
    lines = err.strip().splitlines()
    errors = [ln for ln in lines if ln.startswith("chainyard: error: ")]
    assert "Traceback" not in err, err
    assert got == case.code, (case.id, got, err)
    assert len(errors) == 1, (case.id, lines)
    assert case.fragment in errors[0], (case.id, errors[0])
    return errors[0]


def test_catalogue_size() -> None:
    """The catalogue holds at least 150 distinct bad inputs across every area."""
    ids = [c.id for c in CASES] + [w[0] for w in WORKFLOW_CASES]
    assert len(set(ids)) == len(ids)
    assert len(ids) >= 150
    areas = {c.area for c in CASES} | {"workflow"}
    for area in ("model", "parameters", "sampler", "storage", "seed", "replicas", "policies",
                 "data", "config file", "paths", "cli", "workflow"):  # fmt: skip
        assert area in areas


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_bad_input(
    case: Case, tmp_path: Path, capsys: pytest.CaptureFixture[str], tally: Tally,
    monkeypatch: pytest.MonkeyPatch,
) -> None:  # fmt: skip
    """One documented line, the documented exit status, no traceback, no store made."""
    folder = tmp_path / "run"
    monkeypatch.chdir(tmp_path)
    argv = _setup(case, folder)
    code, err = _run_in_process(argv, capsys)
    _assert_one_line(err, case.code, case, code)
    assert not (folder / "new.zarr").exists()
    if case.argv is None:  # the same input through `check` gives the same answer
        code, err = _run_in_process(["check", argv[1]], capsys)
        _assert_one_line(err, case.code, case, code)
    tally.input()


@pytest.mark.slow
@pytest.mark.parametrize("case_id", _SUBPROCESS_SAMPLE)
def test_bad_input_in_a_real_process(case_id: str, tmp_path: Path, tally: Tally) -> None:
    """A sample of the catalogue gives the same line and status from a real process."""
    case = next(c for c in CASES if c.id == case_id)
    folder = tmp_path / "run"
    argv = _setup(case, folder)
    res = cli(*argv, cwd=tmp_path)
    _assert_one_line(res.stderr, case.code, case, res.returncode)
    assert not (folder / "new.zarr").exists()
    tally.input()


# ---------------------------------------------------------------------- workflow configs
#: (id, the workflow config's ``chainyard`` section (run configs may name files written by
#: the test: ``good.yaml``, ``dup.yaml``), fragment of the one line)
# fmt: off
WORKFLOW_CASES: list[tuple[str, Any, str]] = [
    ("wf-not-mapping", [], "config: chainyard: must be a mapping (with 'runs'), got list"),
    ("wf-runs-missing", {"results": "out"}, "config: runs: required key is missing"),
    ("wf-runs-empty", {"runs": {}}, "config: runs = {}: at least one run is required"),
    ("wf-runs-list", {"runs": ["good.yaml"]}, "config: runs = ['good.yaml']: Input should be"),
    (
        "wf-run-name-space",
        {"runs": {"my run": "good.yaml"}},
        "run name 'my run': use letters, digits, '_' and '-' only",
    ),
    ("wf-run-name-slash", {"runs": {"a/b": "good.yaml"}}, "run name 'a/b': use letters"),
    (
        "wf-run-not-config",
        {"runs": {"a": 5}},
        "config: runs.a = 5: must be a run config (a mapping) or the path of a run config file",
    ),
    (
        "wf-run-file-missing",
        {"runs": {"a": "missing.yaml"}},
        "config: runs.a: missing.yaml: run config file not found",
    ),
    (
        "wf-run-file-directory",
        {"runs": {"a": "."}},
        "config: runs.a: .: is a directory; expected a YAML run config file",
    ),
    (
        "wf-run-file-duplicate-key",
        {"runs": {"a": "dup.yaml"}},
        "config: runs.a: dup.yaml: line 2: key 'seed' appears twice",
    ),
    (
        "wf-run-file-invalid",
        {"runs": {"a": "bad.yaml"}},
        "config: runs.a: bad.yaml: seed = -1: Input should be greater than or equal to 0",
    ),
    (
        "wf-inline-invalid",
        {"runs": {"a": {**base_config(), "seed": -1}}},
        "config: runs.a: seed = -1: Input should be greater than or equal to 0",
    ),
    (
        "wf-inline-unknown-key",
        {"runs": {"a": {**base_config(), "walkers": 8}}},
        "config: runs.a: walkers: unknown key",
    ),
    (
        "wf-inline-replicas-zero",
        {"runs": {"a": {**base_config(), "replicas": 0}}},
        "config: runs.a: replicas = 0: Input should be greater than or equal to 1",
    ),
    (
        "wf-unknown-key",
        {"runs": {"a": "good.yaml"}, "resultz": "out"},
        "config: resultz: unknown key",
    ),
    (
        "wf-results-empty",
        {"runs": {"a": "good.yaml"}, "results": ""},
        "config: results = '': String should have at least 1 character",
    ),
    (
        "wf-runtime-zero",
        {"runs": {"a": "good.yaml"}, "sample_runtime_minutes": 0},
        "config: sample_runtime_minutes = 0: Input should be greater than or equal to 1",
    ),
    (
        "wf-memory-low",
        {"runs": {"a": "good.yaml"}, "sample_mem_mb": 10},
        "config: sample_mem_mb = 10: Input should be greater than or equal to 100",
    ),
    (
        "wf-retries-negative",
        {"runs": {"a": "good.yaml"}, "sample_retries": -1},
        "config: sample_retries = -1: Input should be greater than or equal to 0",
    ),
    (
        "wf-retries-bool",
        {"runs": {"a": "good.yaml"}, "sample_retries": True},
        "config: sample_retries = 'true': Input should be a valid integer",
    ),
]
# fmt: on


@pytest.mark.parametrize(
    ("case_id", "section", "fragment"), WORKFLOW_CASES, ids=[w[0] for w in WORKFLOW_CASES]
)
def test_bad_workflow_config(
    case_id: str, section: Any, fragment: str, tmp_path: Path, tally: Tally,
    monkeypatch: pytest.MonkeyPatch,
) -> None:  # fmt: skip
    """The workflow config (as the rules load it) gives one line naming the key and rule."""
    from chainyard.workflow import load_workflow_config

    write_run(tmp_path, base_config(), name="good.yaml")
    (tmp_path / "dup.yaml").write_text("seed: 1\nseed: 2\n")
    (tmp_path / "bad.yaml").write_text(yaml.safe_dump(base_config(seed=-1)))
    monkeypatch.chdir(tmp_path)
    with pytest.raises(ConfigError) as info:
        load_workflow_config({"chainyard": copy.deepcopy(section)}, source="config")
    lines = str(info.value).splitlines()
    assert info.value.exit_code == 2
    assert len(lines) == 1, lines
    assert fragment in lines[0], lines[0]
    tally.input()


def test_good_workflow_config_loads(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The workflow fixture itself is valid (so each bad case fails for its own reason)."""
    from chainyard.workflow import load_workflow_config

    write_run(tmp_path, base_config(), name="good.yaml")
    monkeypatch.chdir(tmp_path)
    runs = load_workflow_config({"chainyard": {"runs": {"a": "good.yaml", "b": base_config()}}})
    assert sorted(runs) == ["a", "b"]


def test_label_column_is_allowed(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A CSV column with no numbers is a label column (documented rule), not an error."""
    model = (
        "import numpy as np\n"
        "def log_prob(t, d):\n"
        "    assert d['site'].tolist() == ['A', 'B'] and d['y'].dtype == np.float64\n"
        "    return -0.5 * float(t @ t)\n"
    )
    data = copy.deepcopy(base_config(sampler={"walkers": 16, "steps": 20}))
    data["model"]["data"] = "d.csv"
    cfg = write_run(tmp_path, data, model, files={"d.csv": "site,y\nA,1\nB,2\n"})
    assert main(["check", str(cfg)]) == 0, capsys.readouterr().err


def test_open_bounds_may_be_infinite(tmp_path: Path) -> None:
    """Bounds may be -inf/+inf for an open side (same as null); NaN is what is refused."""
    from chainyard.config import parse_config

    cfg = base_config()
    cfg["parameters"][0]["bounds"] = [-INF, INF]
    assert parse_config(cfg).parameters[0].bounds == (-INF, INF)
    assert os.environ.get("CHAINYARD_MAX_CHUNK_BYTES") is None  # the default limit applies
