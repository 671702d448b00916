# Everything a run needs after sampling, in one job per run (imports are most of a small
# job's cost, and every change that reruns one of these steps also changes the next):
# - burn-in and thinning, decided and recorded as a selection over the replica stores
#   (decisions/selection.json: steps used, first kept step, thinning factor); nothing is
#   copied, later steps read the stores through that selection;
# - diagnostics across replicas with the verdict, and the results table (summary.csv);
# - the plots: traces with the burn-in cut, tau against steps, the pairs figure,
#   acceptance per walker.
# A policy or target change reruns this job, never sampling.


rule analyse:
    input:
        raw_stores,
    output:
        burn_in=run_path("{run}", "decisions", "burn_in.json"),
        thinning=run_path("{run}", "decisions", "thinning.json"),
        selection=run_path("{run}", "decisions", "selection.json"),
        record=run_path("{run}", "diagnostics.json"),
        table=report(
            run_path("{run}", "diagnostics.txt"),
            caption="report/diagnostics.rst",
            category="{run}",
            subcategory="diagnostics",
        ),
        summary=report(
            run_path("{run}", "summary.csv"),
            caption="report/summary.rst",
            category="{run}",
            subcategory="summary",
        ),
        traces=report(
            run_path("{run}", "plots", "traces.png"),
            caption="report/traces.rst",
            category="{run}",
            subcategory="plots",
        ),
        tau=report(
            run_path("{run}", "plots", "tau.png"),
            caption="report/tau.rst",
            category="{run}",
            subcategory="plots",
        ),
        pairs=report(
            run_path("{run}", "plots", "pairs.png"),
            caption="report/pairs.rst",
            category="{run}",
            subcategory="plots",
        ),
        acceptance=report(
            run_path("{run}", "plots", "acceptance.png"),
            caption="report/acceptance.rst",
            category="{run}",
            subcategory="plots",
        ),
    params:
        step="analyse",
        run=run_name,
        stores=store_paths,
        sampling=batched_sampling,
        burn_in=burn_in_policy,
        thinning=thinning_policy,
        steps=requested_steps,
        targets=run_targets,
        references=reference_values,
        chainyard_version=CY_VERSION,
    log:
        run_path("logs", "{run}", "analyse.log"),
    threads: 1
    conda:
        "envs/chainyard.yaml"
    resources:
        runtime=60,
        mem_mb=4000,
    script:
        "scripts/step.py"


# A standalone store of one replica's selected steps, written only when asked for, e.g.
#   snakemake results/RUN/standalone/replica-0.zarr
# (to pack or share it on its own; the workflow itself never needs it).
rule standalone:
    input:
        store=run_path("{run}", "draws", "replica-{replica}.zarr"),
        selection=run_path("{run}", "decisions", "selection.json"),
    output:
        directory(run_path("{run}", "standalone", "replica-{replica}.zarr")),
    params:
        step="standalone",
        chainyard_version=CY_VERSION,
    log:
        run_path("logs", "{run}", "standalone-replica-{replica}.log"),
    threads: 1
    conda:
        "envs/chainyard.yaml"
    resources:
        runtime=30,
        mem_mb=1000,
    script:
        "scripts/step.py"
