# Diagnostics across replicas with the verdict, the posterior summary table and the plots of
# each run (traces with the burn-in cut, tau against steps, pairwise marginals, acceptance per
# walker): one job per run, on the selected steps. One job, not two: every change that reruns
# the diagnostics also changes the plots, and a job's imports are most of its cost.


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
