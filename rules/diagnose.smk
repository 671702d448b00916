# Diagnostics across replicas with the verdict, and the posterior summary table: one job per
# run, on the selected steps.


rule diagnose:
    input:
        stores=raw_stores,
        selection=run_path("{run}", "decisions", "selection.json"),
    output:
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
