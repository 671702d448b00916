# Burn-in and thinning: one job per run decides both and records them as a selection over the
# replica stores (decisions/selection.json: steps used, first kept step, thinning factor).
# Later steps read the stores through that selection; nothing is copied. A policy change
# reruns this job and what follows, never sampling.


rule decide:
    input:
        raw_stores,
    output:
        burn_in=run_path("{run}", "decisions", "burn_in.json"),
        thinning=run_path("{run}", "decisions", "thinning.json"),
        selection=run_path("{run}", "decisions", "selection.json"),
    params:
        step="decide",
        burn_in=burn_in_policy,
        thinning=thinning_policy,
        steps=requested_steps,
        chainyard_version=CY_VERSION,
    log:
        run_path("logs", "{run}", "decide.log"),
    threads: 1
    conda:
        "envs/chainyard.yaml"
    resources:
        runtime=30,
        mem_mb=2000,
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
