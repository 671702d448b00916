# Burn-in and thinning: one recorded decision per run, applied to every replica.


rule decide_burn_in:
    input:
        raw_stores,
    output:
        run_path("{run}", "decisions", "burn_in.json"),
    params:
        step="decide",
        what="burn_in",
        policy=burn_in_policy,
        chainyard_version=CY_VERSION,
    log:
        run_path("logs", "{run}", "decide-burn-in.log"),
    threads: 1
    conda:
        "envs/chainyard.yaml"
    resources:
        runtime=30,
        mem_mb=2000,
    script:
        "scripts/step.py"


rule trim:
    input:
        store=run_path("{run}", "draws", "replica-{replica}.zarr"),
        record=run_path("{run}", "decisions", "burn_in.json"),
    output:
        directory(run_path("{run}", "trimmed", "replica-{replica}.zarr")),
    params:
        step="derive",
        what="burn_in",
        replica=replica_index,
        chainyard_version=CY_VERSION,
    log:
        run_path("logs", "{run}", "trim-replica-{replica}.log"),
    threads: 1
    conda:
        "envs/chainyard.yaml"
    resources:
        runtime=30,
        mem_mb=1000,
    script:
        "scripts/step.py"


rule decide_thinning:
    input:
        trimmed_stores,
    output:
        run_path("{run}", "decisions", "thinning.json"),
    params:
        step="decide",
        what="thinning",
        policy=thinning_policy,
        chainyard_version=CY_VERSION,
    log:
        run_path("logs", "{run}", "decide-thinning.log"),
    threads: 1
    conda:
        "envs/chainyard.yaml"
    resources:
        runtime=30,
        mem_mb=2000,
    script:
        "scripts/step.py"


rule thin:
    input:
        store=run_path("{run}", "trimmed", "replica-{replica}.zarr"),
        record=run_path("{run}", "decisions", "thinning.json"),
    output:
        directory(run_path("{run}", "final", "replica-{replica}.zarr")),
    params:
        step="derive",
        what="thinning",
        replica=replica_index,
        chainyard_version=CY_VERSION,
    log:
        run_path("logs", "{run}", "thin-replica-{replica}.log"),
    threads: 1
    conda:
        "envs/chainyard.yaml"
    resources:
        runtime=30,
        mem_mb=1000,
    script:
        "scripts/step.py"
