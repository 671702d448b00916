"""Rule script of the chainyard rule library: hands the job to chainyard.workflow.jobs."""

from chainyard.workflow.jobs import run_job

run_job(snakemake)  # type: ignore[name-defined]  # noqa: F821
