# fegrid, run from its source checkout: `snakemake -c 2` fits the invented demo grid,
# `snakemake -c 2 --configfile my_grid.yaml` a grid of your own. The workflow itself is
# workflow/Snakefile (it ships inside the package; `fegrid run` calls it from any folder).


# `--configfile other.yaml` replaces the demo grid entirely instead of merging into it.
if not config:

    configfile: "config/config.yaml"


# a module, not an include: an included file's default target (rule all) would not carry over
module fegrid_workflow:
    snakefile:
        "workflow/Snakefile"
    config:
        config


use rule * from fegrid_workflow
