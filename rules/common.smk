# Helpers and config validation shared by the chainyard rules.
import inspect
import json
import sys

import chainyard
import chainyard.workflow as cy_workflow
from chainyard.errors import ConfigError
from chainyard.workflow.batches import plan_batches
from snakemake.exceptions import WorkflowError
from snakemake.utils import validate


# 1. pydantic first: chainyard's one-line messages (as `chainyard check` prints them),
# 2. then the JSON Schema (generated from the same models) through snakemake's validator.
try:
    CY_RUNS = cy_workflow.load_workflow_config(config, source="config")
except ConfigError as exc:
    # one line per problem and chainyard's exit status, no traceback of the Snakefile
    for line in str(exc).splitlines():
        print(f"chainyard: error: {line}", file=sys.stderr)
    sys.exit(exc.exit_code)
validate(config, cy_workflow.schema_path(), set_default=False)

CY = config["chainyard"]
CY_RESULTS = CY.get("results", "results")
CY_VERSION = chainyard.__version__
CY_SAMPLE_RUNTIME = int(CY.get("sample_runtime_minutes", 60))
CY_SAMPLE_MEM = int(CY.get("sample_mem_mb", 2000))
CY_SAMPLE_RETRIES = int(CY.get("sample_retries", 2))
# batched sampling of family members (chainyard.workflow.batches): batch name -> members
CY_BATCH = int(CY.get("sample_batch", 1))
CY_BATCHES = plan_batches(CY_RUNS, CY_BATCH) if CY_BATCH > 1 else {}
CY_BATCH_OF = {run: batch for batch, runs in CY_BATCHES.items() for run in runs}
# a run name is one folder name (a regular expression, not the list of names: matching
# thousands of alternatives cost most of the planning time of large workflows)
CY_RUN_PATTERN = r"[A-Za-z0-9_-]+(?:\.[A-Za-z0-9][A-Za-z0-9_.-]*)?"


wildcard_constraints:
    run=CY_RUN_PATTERN,
    replica=r"\d+",


def cy_fn(func):
    """Record an input/param/resource function's parameter names once: Snakemake otherwise
    inspects the signature at every call (measured: about a third of the planning time of a
    large workflow)."""
    try:
        from snakemake.common import overwrite_function_params
    except ImportError:  # pragma: no cover - an older snakemake: it inspects every call
        return func
    overwrite_function_params(func, inspect.signature(func).parameters)
    return func


def run_path(run, *parts):
    """Path under the run's results folder."""
    return "/".join([CY_RESULTS, run, *parts])


def replica_stores(run):
    """The sampled replica stores of one run."""
    n = CY_RUNS[run].config.replicas
    return [run_path(run, "draws", f"replica-{r}.zarr") for r in range(n)]


@cy_fn
def sample_inputs(wildcards):
    return CY_RUNS[wildcards.run].input_files()


def sampling_section(name):
    """A rule-param function giving one section of a run's sampling settings (JSON)."""

    def section(wildcards):
        return CY_RUNS[wildcards.run].sampling_section(name)

    return cy_fn(section)


@cy_fn
def run_base_dir(wildcards):
    return CY_RUNS[wildcards.run].base_dir


@cy_fn
def replica_index(wildcards):
    return int(wildcards.replica)


@cy_fn
def resumable_store(wildcards):
    return run_path(wildcards.run, ".resumable", f"replica-{wildcards.replica}.zarr")


@cy_fn
def sample_runtime(wildcards, attempt):
    return CY_SAMPLE_RUNTIME * attempt


@cy_fn
def job_attempt(wildcards, attempt):
    """Snakemake's attempt number, as a resource: a retry of a job whose earlier attempt ended
    in a failure no retry can mend fails at once (see chainyard.workflow.retry)."""
    return attempt


@cy_fn
def burn_in_policy(wildcards):
    return CY_RUNS[wildcards.run].param("burn_in")


@cy_fn
def thinning_policy(wildcards):
    return CY_RUNS[wildcards.run].param("thinning")


@cy_fn
def run_targets(wildcards):
    return CY_RUNS[wildcards.run].param("targets")


@cy_fn
def run_name(wildcards):
    return wildcards.run


@cy_fn
def reference_values(wildcards):
    """The run's reference values from the current config (drawn on the plots), plain JSON."""
    params = CY_RUNS[wildcards.run].config.parameters
    refs = {p.name: p.reference_value for p in params if p.reference_value is not None}
    return json.dumps(refs, sort_keys=True)


def batch_file(batch):
    """The outcome file of a batched sampling job."""
    return run_path(".batches", f"{batch}.json")


@cy_fn
def batch_inputs(wildcards):
    """Files the draws of a batch's members depend on."""
    files = set()
    for run in CY_BATCHES[wildcards.batch]:
        files.update(CY_RUNS[run].input_files())
    return sorted(files)


@cy_fn
def batch_members(wildcards):
    """The sampling settings of a batch's members, one JSON list (the batch's rerun trigger)."""
    members = []
    for run in CY_BATCHES[wildcards.batch]:
        entry = CY_RUNS[run]
        members.append(
            {
                "run": run,
                "settings": entry.param("sampling"),
                "base_dir": entry.base_dir,
                "replicas": [
                    [r, run_path(run, ".resumable", f"replica-{r}.zarr"), store]
                    for r, store in enumerate(replica_stores(run))
                ],
            }
        )
    return json.dumps(members, sort_keys=True)


@cy_fn
def raw_stores(wildcards):
    """The run's sampled stores; for a batched member, its batch's outcome file (a rerun of
    the batch reruns the analysis of its members: Snakemake skips a job downstream of a
    rerun whose inputs are all marked ancient even when its own outputs are missing)."""
    batch = CY_BATCH_OF.get(wildcards.run)
    if batch is not None:
        return [batch_file(batch)]
    return replica_stores(wildcards.run)


@cy_fn
def store_paths(wildcards):
    """The run's sampled stores (JSON list)."""
    return json.dumps(replica_stores(wildcards.run))


@cy_fn
def batched_sampling(wildcards):
    """A batched member's sampling settings (its analysis reruns when they change, as the
    sampling job of an unbatched run would); empty for other runs."""
    if wildcards.run in CY_BATCH_OF:
        return CY_RUNS[wildcards.run].param("sampling")
    return ""


@cy_fn
def requested_steps(wildcards):
    return CY_RUNS[wildcards.run].config.sampler.steps


PLOTS = ("traces", "tau", "pairs", "acceptance")


def results_file(name):
    """A file directly under the results folder (not in a run's folder)."""
    return "/".join([CY_RESULTS, name])


@cy_fn
def results_folder(wildcards, output):
    """The results folder, from a rule's first output directly under it."""
    return output[0].rpartition("/")[0]


def overview_page():
    """The report's opening page: the overview once written, else a placeholder."""
    import os

    page = os.path.abspath(results_file("overview.rst"))
    return page if os.path.exists(page) else "report/no_overview.rst"


def unbatched_stores():
    """The stores of every run sampled by its own jobs (inputs of the overview)."""
    return [s for run in sorted(CY_RUNS) if run not in CY_BATCH_OF for s in replica_stores(run)]


def all_outputs():
    out = [results_file("runs.csv")]
    for run in sorted(CY_RUNS):
        out.append(run_path(run, "summary.csv"))
        out.append(run_path(run, "diagnostics.txt"))
        out += [run_path(run, "plots", f"{p}.png") for p in PLOTS]
    return out
