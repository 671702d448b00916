"""The workflow config: which runs to sample, where results go, rule settings."""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

from chainyard.config import (
    JSON_SCHEMA_DIALECT,
    RunConfig,
    format_validation_error,
    parse_config,
)
from chainyard.errors import ConfigError

__all__ = ["RunEntry", "WorkflowConfig", "load_workflow_config", "workflow_json_schema"]


class WorkflowConfig(BaseModel):
    """The ``chainyard`` section of a workflow's config file."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    runs: dict[str, RunConfig | str] = Field(
        description=(
            "Run name -> run configuration: either inline (paths relative to the workflow's "
            "working directory) or the path of a run config YAML file (paths inside it "
            "relative to that file)."
        )
    )
    results: str = Field(default="results", description="Folder for all outputs.")
    sample_runtime_minutes: int = Field(
        default=60, ge=1, description="Runtime of a sampling job (minutes), times the attempt."
    )
    sample_mem_mb: int = Field(default=2000, ge=100, description="Memory of a sampling job.")
    sample_retries: int = Field(
        default=2, ge=0, description="Retries of a killed sampling job (each resumes)."
    )

    @field_validator("runs")
    @classmethod
    def _names(cls, value: dict[str, Any]) -> dict[str, Any]:
        if not value:
            raise ValueError("at least one run is required")
        for name in value:
            if not name.replace("_", "").replace("-", "").isalnum():
                raise ValueError(
                    f"run name {name!r}: use letters, digits, '_' and '-' only"
                )
        return value


@dataclass(frozen=True)
class RunEntry:
    """One run of the workflow, with its config resolved.

    Attributes
    ----------
    name : str
    config : RunConfig
    base_dir : str
        Directory (relative to the working directory) that the run config's paths are
        relative to.
    """

    name: str
    config: RunConfig
    base_dir: str

    def _rel(self, path: str) -> str:
        p = Path(path)
        return str(p) if p.is_absolute() else str(Path(self.base_dir) / p)

    def input_files(self) -> list[str]:
        """Files the draws depend on: model source(s), data, loader, initial positions."""
        from chainyard.model import resolve_source

        m = self.config.model
        files = []
        for ref in (m.log_prob, m.data_loader):
            if ref is None:
                continue
            module = ref.rpartition(":")[0]
            if module.endswith(".py") or "/" in module:
                files.append(self._rel(module))
            else:
                src = resolve_source(ref, Path(self.base_dir))
                if src is not None:
                    files.append(str(src))
        files += [self._rel(s) for s in m.extra_sources]
        if m.data:
            files.append(self._rel(m.data))
        if self.config.sampler.initial_positions:
            files.append(self._rel(self.config.sampler.initial_positions))
        return sorted(set(files))

    def param(self, section: str) -> str:
        """A config section as a canonical JSON string (a plain, sorted rule param)."""
        norm = self.config.normalised()
        value = self.config.sampling_settings() if section == "sampling" else norm[section]
        return json.dumps(value, sort_keys=True, separators=(",", ":"))


def load_workflow_config(config: dict[str, Any], source: str = "config") -> dict[str, RunEntry]:
    """Validate the workflow config (pydantic) and resolve every run.

    Raises
    ------
    ConfigError
        One line per problem, naming the key (e.g. ``runs.cooling.sampler.walkerz``).
    """
    section = config.get("chainyard", config)
    try:
        wf = WorkflowConfig.model_validate(section)
    except ValidationError as exc:
        raise ConfigError(format_validation_error(exc, source)) from None
    entries: dict[str, RunEntry] = {}
    problems: list[str] = []
    for name, run in wf.runs.items():
        if isinstance(run, str):
            path = Path(run)
            try:
                data = yaml.safe_load(path.read_text())
                cfg = parse_config(data, base_dir=path.parent, source=str(path))
            except FileNotFoundError:
                problems.append(f"{source}: runs.{name} = {run!r}: run config file not found")
                continue
            except ConfigError as exc:
                problems.extend(exc.problems)
                continue
            entries[name] = RunEntry(name, cfg, str(path.parent))
        else:
            cfg = parse_config(run.model_dump(), base_dir=Path.cwd(), source=f"runs.{name}")
            entries[name] = RunEntry(name, cfg, ".")
    if problems:
        raise ConfigError(problems)
    return entries


def workflow_results(config: dict[str, Any]) -> str:
    """The results folder of a workflow config (default ``results``)."""
    return str(config.get("chainyard", config).get("results", "results"))


def workflow_json_schema() -> dict[str, Any]:
    """JSON Schema of the workflow config, with ``$schema`` set (snakemake.utils.validate)."""
    inner = WorkflowConfig.model_json_schema()
    defs = inner.pop("$defs", {})
    return {
        "$schema": JSON_SCHEMA_DIALECT,
        "$defs": {**defs, "WorkflowConfig": inner},
        "type": "object",
        "properties": {"chainyard": {"$ref": "#/$defs/WorkflowConfig"}},
        "required": ["chainyard"],
    }
