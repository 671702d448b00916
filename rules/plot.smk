# Plots of each run: traces with the burn-in cut, tau against steps, pairwise marginals,
# acceptance per walker.


rule plot:
    input:
        stores=raw_stores,
        selection=run_path("{run}", "decisions", "selection.json"),
        diagnostics=run_path("{run}", "diagnostics.json"),
    output:
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
        step="plot",
        chainyard_version=CY_VERSION,
    log:
        run_path("logs", "{run}", "plot.log"),
    threads: 1
    conda:
        "envs/chainyard.yaml"
    resources:
        runtime=30,
        mem_mb=4000,
    script:
        "scripts/step.py"
