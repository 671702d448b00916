"""Helpers for the Snakemake rule library: where the rules are, reading the workflow config,
and the plain parameters each rule passes (JSON strings with sorted keys, so Snakemake's
rerun detection sees every change and nothing else).

A user's Snakefile::

    import chainyard.workflow

    configfile: "config/config.yaml"

    module chainyard_rules:
        snakefile: chainyard.workflow.rules_path()
        config: config

    use rule * from chainyard_rules as chainyard_*
"""

from chainyard.workflow.config import (
    RunEntry,
    WorkflowConfig,
    load_workflow_config,
    workflow_json_schema,
)
from chainyard.workflow.paths import rules_path, schema_path

__all__ = [
    "RunEntry",
    "WorkflowConfig",
    "load_workflow_config",
    "rules_path",
    "schema_path",
    "workflow_json_schema",
]
