# Sampling one replica of one run. The resumable store lives in RESULTS/RUN/.resumable/, which
# Snakemake never deletes; the declared output is a hard-linked copy published at the end.
# A killed job resumes from its last commit on the next run or retry; a larger `steps`
# extends the chains exactly; a changed model, data or sampling setting starts over.
# `threads` (chainyard.sample_threads) are the CPUs the job may use for the model's worker
# processes; they are not a rerun trigger and not part of the store's identity.


rule sample:
    wildcard_constraints:
        # with batching on, family members (FAMILY.KEY) are sampled by sample_batch
        run=r"[A-Za-z0-9_-]+" if CY_BATCH > 1 else CY_RUN_PATTERN,
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


# Batched sampling (chainyard.sample_batch = K > 1; see chainyard.workflow.batches): one job
# samples up to K members of a family, each replica in the member's own resumable store,
# publishes (hard links) each sampled member's stores at RESULTS/MEMBER/draws/, and writes
# an outcome per member (a member's deterministic failure is recorded there and does not
# stop the others). A member's analysis reads its published stores, or ends with the
# member's recorded message and exit status.
if CY_BATCH > 1:

    rule sample_batch:
        input:
            batch_inputs,
        output:
            run_path(".batches", "{batch}.json"),
        wildcard_constraints:
            batch=r"[A-Za-z0-9_-]+~\d+",
        params:
            step="sample_batch",
            members=batch_members,
            chainyard_version=CY_VERSION,
        log:
            run_path("logs", "batches", "{batch}.log"),
        threads: int(CY.get("sample_threads", 1))
        conda:
            "envs/chainyard.yaml"
        resources:
            runtime=cy_fn(lambda wildcards, attempt: CY_SAMPLE_RUNTIME * attempt * CY_BATCH),
            mem_mb=CY_SAMPLE_MEM,
            attempt=job_attempt,
        retries: CY_SAMPLE_RETRIES
        script:
            "scripts/step.py"
