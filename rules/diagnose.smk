# Diagnostics across replicas with the verdict, and the posterior summary table.


rule diagnose:
    input:
        final_stores,
    output:
        record=run_path("{run}", "diagnostics.json"),
        table=report(
            run_path("{run}", "diagnostics.txt"),
            caption="report/diagnostics.rst",
            category="{run}",
            subcategory="diagnostics",
        ),
    params:
        step="diagnose",
        run=run_name,
        targets=run_targets,
        chainyard_version=CY_VERSION,
    log:
        run_path("logs", "{run}", "diagnose.log"),
    threads: 1
    conda:
        "envs/chainyard.yaml"
    resources:
        runtime=60,
        mem_mb=4000,
    script:
        "scripts/step.py"


rule summarise:
    input:
        stores=final_stores,
        diagnostics=run_path("{run}", "diagnostics.json"),
    output:
        report(
            run_path("{run}", "summary.csv"),
            caption="report/summary.rst",
            category="{run}",
            subcategory="summary",
        ),
    params:
        step="summary",
        chainyard_version=CY_VERSION,
    log:
        run_path("logs", "{run}", "summarise.log"),
    threads: 1
    conda:
        "envs/chainyard.yaml"
    resources:
        runtime=10,
        mem_mb=1000,
    script:
        "scripts/step.py"
