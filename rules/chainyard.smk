# chainyard rule library: sampling, burn-in, thinning, diagnostics, plots and report items
# for every run in config["chainyard"]["runs"]. Use it as a module:
#
#   import chainyard.workflow
#   module chainyard_rules:
#       snakefile: chainyard.workflow.rules_path()
#       config: config
#   use rule * from chainyard_rules as chainyard_*


include: "common.smk"
include: "sample.smk"
include: "analyse.smk"
include: "overview.smk"


# The report opens on the overview of all runs (written by the overview rule).
report: overview_page()


rule all:
    default_target: True
    input:
        all_outputs(),
