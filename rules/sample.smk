# Sampling one replica of one run. The resumable store lives in RESULTS/RUN/.resumable/, which
# Snakemake never deletes; the declared output is a hard-linked copy published at the end.
# A killed job resumes from its last commit on the next run or retry; a larger `steps`
# extends the chains exactly; a changed model, data or sampling setting starts over.
# `threads` (chainyard.sample_threads) are the CPUs the job may use for the model's worker
# processes; they are not a rerun trigger and not part of the store's identity.


rule sample:
    input:
        sample_inputs,
    output:
        directory(run_path("{run}", "draws", "replica-{replica}.zarr")),
    params:
        step="sample",
        # the sampling settings, one param per section: a rerun reason names what changed
        model=sampling_section("model"),
        parameters=sampling_section("parameters"),
        sampler=sampling_section("sampler"),
        storage=sampling_section("storage"),
        seed=sampling_section("seed"),
        base_dir=run_base_dir,
        replica=replica_index,
        resumable=resumable_store,
        chainyard_version=CY_VERSION,
    log:
        run_path("logs", "{run}", "sample-replica-{replica}.log"),
    threads: int(CY.get("sample_threads", 1))  # the model's worker processes (--workers auto)
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
