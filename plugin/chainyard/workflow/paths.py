"""Where the shipped rule files are."""

from __future__ import annotations

from importlib import resources
from pathlib import Path

__all__ = ["rules_path", "schema_path"]


def _rules_dir() -> Path:
    return Path(str(resources.files("chainyard.rules")))


def rules_path() -> str:
    """Path of the rule library's entry Snakefile (for ``module ...: snakefile:``)."""
    return str(_rules_dir() / "chainyard.smk")


def schema_path() -> str:
    """Path of the shipped JSON Schema of the workflow config (for snakemake's validate)."""
    return str(_rules_dir() / "workflow_config.schema.json")
