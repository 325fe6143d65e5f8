# fegrid: a declared grid of fixed-effects regressions, fitted in cached blocks.
# This file only wires: the package workflow/fegrid/ does every computation.
from snakemake.utils import min_version

min_version("8.20")


# `--configfile other.yaml` replaces the demo grid entirely instead of merging into it.
if not config:

    configfile: "config/config.yaml"


include: "workflow/rules/common.smk"
include: "workflow/rules/fit.smk"
include: "workflow/rules/ledger.smk"
include: "workflow/rules/report.smk"


rule all:
    input:
        final_outputs(),
    default_target: True
