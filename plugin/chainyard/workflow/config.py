"""The workflow config: which runs to sample, where results go, rule settings."""

from __future__ import annotations

import json
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Any

from pydantic import Field, ValidationError, field_validator

from chainyard.config import (
    JSON_SCHEMA_DIALECT,
    RunConfig,
    format_validation_error,
    parse_config,
)
from chainyard.config._base import _Strict
from chainyard.config.yamlfile import read_yaml_file
from chainyard.errors import ConfigError
from chainyard.workflow.families import FamilySpec, is_family, read_family

__all__ = ["RunEntry", "WorkflowConfig", "load_workflow_config", "workflow_json_schema"]


class WorkflowConfig(_Strict):
    """The ``chainyard`` section of a workflow's config file (strict like a run config)."""

    runs: dict[str, RunConfig | FamilySpec | str] = Field(
        description=(
            "Run name -> run configuration: either inline (paths relative to the workflow's "
            "working directory), the path of a run config YAML file (paths inside it "
            "relative to that file), or a run family (template, table, key, fill: one run "
            "FAMILY.KEY per table row)."
        )
    )
    results: str = Field(default="results", min_length=1, description="Folder for all outputs.")
    sample_runtime_minutes: int = Field(
        default=60, ge=1, description="Runtime of a sampling job (minutes), times the attempt."
    )
    sample_mem_mb: int = Field(default=2000, ge=100, description="Memory of a sampling job.")
    sample_retries: int = Field(
        default=2, ge=0, description="Retries of a killed sampling job (each resumes)."
    )
    sample_threads: int = Field(
        default=1,
        ge=1,
        description=(
            "CPUs of a sampling job (the rule's threads): its model calls run in up to this "
            "many worker processes where timing shows it pays (sample --workers auto)."
        ),
    )
    sample_batch: int = Field(
        default=1,
        ge=1,
        description=(
            "Family members sampled per sampling job (1: one job per member and replica). "
            "Each member keeps its own stores; a member's failure is recorded by name and "
            "does not stop the others."
        ),
    )

    @field_validator("runs")
    @classmethod
    def _names(cls, value: dict[str, Any]) -> dict[str, Any]:
        if not value:
            raise ValueError("at least one run is required")
        for name in value:
            if not name.replace("_", "").replace("-", "").isalnum():
                raise ValueError(f"run name {name!r}: use letters, digits, '_' and '-' only")
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
    family: str | None = None

    def _rel(self, path: str) -> str:
        p = Path(path)
        return str(p) if p.is_absolute() else str(Path(self.base_dir) / p)

    def _input_files(self) -> list[str]:
        from chainyard.model import resolve_source

        m = self.config.model
        files: list[str] = []
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

    @cached_property
    def _inputs(self) -> list[str]:
        return self._input_files()

    def input_files(self) -> list[str]:
        """Files the draws depend on: model source(s), data, loader, initial positions
        (computed once per entry: Snakemake asks once per job)."""
        return list(self._inputs)

    @cached_property
    def _sections(self) -> dict[str, str]:
        settings = self.config.sampling_settings()
        return {
            name: json.dumps({name: value}, sort_keys=True, separators=(",", ":"))
            for name, value in settings.items()
        }

    @cached_property
    def _normalised(self) -> dict[str, Any]:
        return self.config.normalised()

    def sampling_section(self, name: str) -> str:
        """One top-level section of the sampling settings as canonical JSON ``{name: value}``
        (one rule param per section, so Snakemake's rerun reason shows only the changed
        section, named). Computed once per entry."""
        return self._sections[name]

    def param(self, section: str) -> str:
        """A config section as a canonical JSON string (a plain, sorted rule param)."""
        if section == "sampling":
            value = self.config.sampling_settings()
        else:
            value = self._normalised[section]
        return json.dumps(value, sort_keys=True, separators=(",", ":"))


def load_workflow_config(config: dict[str, Any], source: str = "config") -> dict[str, RunEntry]:
    """Validate the workflow config (pydantic) and resolve every run.

    Raises
    ------
    ConfigError
        One line per problem, naming the key (e.g. ``runs.cooling.sampler.walkerz``).
    """
    if not isinstance(config, dict):
        raise ConfigError(f"{source}: must be a mapping, got {type(config).__name__}")
    if "chainyard" not in config:
        found = ", ".join(sorted(map(str, config))) or "nothing"
        raise ConfigError(
            f"{source}: no 'chainyard:' section (found: {found}); put the workflow settings "
            "under it, e.g. chainyard: {runs: {kiln: config/runs/kiln.yaml}}"
        )
    section = config["chainyard"]
    if not isinstance(section, dict):
        raise ConfigError(
            f"{source}: chainyard: must be a mapping (with 'runs'), got {type(section).__name__}"
        )
    runs = section.get("runs")
    # a family's entry is checked by read_family (with its own one-line messages)
    for name in runs if isinstance(runs, dict) else ():
        if not isinstance(name, str) or not name.replace("_", "").replace("-", "").isalnum():
            raise ConfigError(
                f"{source}: runs: run name {name!r}: use letters, digits, '_' and '-' only"
            )
    # the runs are checked one by one below (a union error would say everything twice)
    shell = {**section, "runs": dict.fromkeys(runs, "-")} if isinstance(runs, dict) else section
    try:
        WorkflowConfig.model_validate(shell)
    except ValidationError as exc:
        raise ConfigError(format_validation_error(exc, source, WorkflowConfig)) from None
    assert isinstance(runs, dict)
    entries: dict[str, RunEntry] = {}
    problems: list[str] = []
    for name, run in runs.items():
        where = f"{source}: runs.{name}"
        try:
            if is_family(run):
                for member, cfg, base in read_family(name, run, source):
                    if member in runs:  # pragma: no cover - '.' is not allowed in run names
                        raise ConfigError(f"{where}: member {member} is also a run")
                    entries[member] = RunEntry(member, cfg, base, family=name)
            elif isinstance(run, str):
                path = Path(run)
                data = read_yaml_file(path, "run config file")
                cfg = parse_config(data, base_dir=path.parent, source=str(path))
                entries[name] = RunEntry(name, cfg, str(path.parent))
            elif isinstance(run, dict):
                cfg = parse_config(run, base_dir=Path.cwd(), source=where)
                entries[name] = RunEntry(name, cfg, ".")
            else:
                problems.append(
                    f"{where} = {run!r}: must be a run config (a mapping) or the path of a "
                    "run config file"
                )
        except ConfigError as exc:
            problems.extend(exc.located(where).problems if isinstance(run, str) else exc.problems)
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


#: the top-level sections of :meth:`RunConfig.sampling_settings`, one sampling-rule param each
SAMPLING_SECTIONS = ("model", "parameters", "sampler", "storage", "seed")


def sampling_settings_of(params: Any) -> str:
    """The sampling settings of a sampling job as one canonical JSON string, joined from its
    per-section rule params (see :meth:`RunEntry.sampling_section`)."""
    joined = {name: json.loads(getattr(params, name))[name] for name in SAMPLING_SECTIONS}
    return json.dumps(joined, sort_keys=True, separators=(",", ":"))
