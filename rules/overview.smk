# The cross-run overview: RESULTS/runs.csv (one row per run, runs that did not meet their
# targets first), RESULTS/runs.png (worst R-hat against lowest ESS, one point per run) and
# the report's opening page (RESULTS/overview.rst: the figure and the table, linking to
# every run's plots and tables).


rule overview:
    input:
        diagnostics=[run_path(run, "diagnostics.json") for run in sorted(CY_RUNS)],
        stores=unbatched_stores(),
    output:
        table=report(
            results_file("runs.csv"),
            caption="report/runs.rst",
            category="overview",
        ),
        figure=report(
            results_file("runs.png"),
            caption="report/runs_figure.rst",
            category="overview",
        ),
        page=results_file("overview.rst"),
    params:
        step="overview",
        stores=json.dumps({run: replica_stores(run) for run in sorted(CY_RUNS)}, sort_keys=True),
        results=results_folder,
        chainyard_version=CY_VERSION,
    log:
        run_path("logs", "overview.log"),
    threads: 1
    conda:
        "envs/chainyard.yaml"
    resources:
        runtime=10,
        mem_mb=1000,
    script:
        "scripts/step.py"
