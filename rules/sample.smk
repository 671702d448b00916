# Sampling one replica of one run. The resumable store lives in RESULTS/RUN/.resumable/, which
# Snakemake never deletes; the declared output is a hard-linked copy published at the end.
# A killed job resumes from its last commit on the next run or retry; a larger `steps`
# extends the chains exactly; a changed model, data or sampling setting starts over.


rule sample:
    input:
        sample_inputs,
    output:
        directory(run_path("{run}", "draws", "replica-{replica}.zarr")),
    params:
        step="sample",
        settings=sampling_settings,
        base_dir=run_base_dir,
        replica=replica_index,
        resumable=resumable_store,
        chainyard_version=CY_VERSION,
    log:
        run_path("logs", "{run}", "sample-replica-{replica}.log"),
    threads: 1
    conda:
        "envs/chainyard.yaml"
    resources:
        runtime=sample_runtime,
        mem_mb=CY_SAMPLE_MEM,
        attempt=job_attempt,
    retries: CY_SAMPLE_RETRIES
    cache: "omit-software"
    script:
        "scripts/step.py"
