"""The run configuration: the minimal config, defaults, schema export and messages."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import yaml

from chainyard import ConfigError, json_schema, load_config, parse_config
from tests.conftest import MINIMAL_CONFIG, base_config


def test_minimal_config_is_valid(tmp_path: Path) -> None:
    """The minimal config of the core-engine issue validates exactly as written."""
    path = tmp_path / "run.yaml"
    path.write_text(MINIMAL_CONFIG)
    config = load_config(path)
    assert config.param_names == ("x", "y")
    assert config.sampler.walkers == 16 and config.sampler.steps == 2000 and config.seed == 7
    assert config.base_dir == tmp_path.resolve()


def test_defaults_are_filled_and_documented() -> None:
    """Optional settings get their documented defaults (one stretch move, pcodec, ...)."""
    norm = parse_config(base_config()).normalised()
    assert norm["sampler"]["moves"] == [{"kind": "stretch", "scale": 2.0, "weight": 1.0}]
    assert norm["storage"]["codec"] == "pcodec"
    assert norm["storage"]["fsync"] is True
    assert norm["targets"]["max_nested_rhat"] == 1.01
    assert norm["replicas"] == 1


def test_schema_has_dialect_and_descriptions() -> None:
    """The JSON Schema names its dialect (needed by snakemake.utils.validate)."""
    schema = json_schema()
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    assert schema["additionalProperties"] is False
    text = json.dumps(schema)
    assert "log_prob" in text and "chunk_steps" in text


def test_committed_schema_is_current() -> None:
    """rules/run_config.schema.json equals what `chainyard schema` prints (refresh: make schema)."""
    committed = Path(__file__).parents[2] / "rules" / "run_config.schema.json"
    assert json.loads(committed.read_text()) == json_schema()


def test_schema_validates_minimal_config_with_jsonschema() -> None:
    """The exported schema accepts the minimal config (jsonschema, the reference validator)."""
    jsonschema = pytest.importorskip("jsonschema")
    jsonschema.validate(yaml.safe_load(MINIMAL_CONFIG), json_schema())


def test_with_steps_keeps_everything_else() -> None:
    """with_steps changes only the step count."""
    config = parse_config(base_config())
    longer = config.with_steps(5000)
    assert longer.sampler.steps == 5000
    a, b = config.normalised(), longer.normalised()
    a["sampler"].pop("steps"), b["sampler"].pop("steps")
    assert a == b


def test_all_problems_reported_at_once() -> None:
    """Several mistakes give one line each, not just the first."""
    cfg = base_config(sampler={"walkers": "many", "stepz": 3}, seed=-1)
    with pytest.raises(ConfigError) as info:
        parse_config(cfg, source="run.yaml")
    lines = str(info.value).splitlines()
    assert len(lines) == 3
    assert all(line.startswith("run.yaml: ") for line in lines)


def test_yaml_merge_key_may_be_overridden(tmp_path: Path) -> None:
    """A mapping may override what it merges in with '<<' (YAML 1.1 merge keys, not a duplicate);
    a key given twice in one mapping is refused (PyYAML alone would keep the last one)."""
    text = MINIMAL_CONFIG.replace(
        "init: {normal: {loc: 0.0, scale: 1.0}}", "init: &start {normal: {loc: 0.0, scale: 1.0}}"
    ).replace(
        "init: {uniform: {low: -1.0, high: 1.0}}",
        "init: {<<: *start, normal: {loc: 3.0, scale: 1.0}}",
    )
    path = tmp_path / "run.yaml"
    path.write_text(text)
    assert load_config(path).parameters[1].init.normal.loc == 3.0  # type: ignore[union-attr]
    path.write_text(MINIMAL_CONFIG + "seed: 8\n")
    with pytest.raises(ConfigError, match=r"line 12: key 'seed' appears twice .*first at line 11"):
        load_config(path)


def test_utf8_bom_config_is_read(tmp_path: Path) -> None:
    """A UTF-8 byte-order mark before a config is allowed (the YAML 1.2 spec permits it)."""
    path = tmp_path / "run.yaml"
    path.write_bytes(b"\xef\xbb\xbf" + MINIMAL_CONFIG.encode())
    assert load_config(path).seed == 7


def test_booleans_still_accepted_where_booleans_belong() -> None:
    """The true/false guard for numbers leaves boolean settings alone (fsync, vectorized)."""
    cfg = base_config(storage={"fsync": False}, model={"vectorized": True})
    config = parse_config(cfg)
    assert config.storage.fsync is False and config.model.vectorized is True
    with pytest.raises(ConfigError, match=r"storage\.chunk_steps = 'true'"):
        parse_config(base_config(storage={"chunk_steps": True}))


def test_chunk_limit_follows_its_environment_variable(monkeypatch: pytest.MonkeyPatch) -> None:
    """The chunk size check uses chainyard.limits (raised with CHAINYARD_MAX_CHUNK_BYTES)."""
    cfg = base_config(storage={"chunk_steps": 100_000})  # 100,000 x 16 x 4 x 8 = 51.2 MB
    monkeypatch.setenv("CHAINYARD_MAX_CHUNK_BYTES", str(50_000_000))
    with pytest.raises(ConfigError, match="51,200,000 bytes, above the chunk_bytes limit"):
        parse_config(cfg)
    monkeypatch.setenv("CHAINYARD_MAX_CHUNK_BYTES", str(60_000_000))
    assert parse_config(cfg).storage.chunk_steps == 100_000
