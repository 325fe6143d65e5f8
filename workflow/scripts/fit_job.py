"""Rule fit_job: fit one job's specifications, reusing stored demeaned columns."""

from fegrid.grid import load_config
from fegrid.pipeline import fit_job, run_logged

snakemake = globals()["snakemake"]
run_logged(
    snakemake.log[0],
    fit_job,
    load_config(snakemake.config),
    snakemake.input.snapshot,
    snakemake.wildcards.job,
    snakemake.output.results,
    snakemake.params.store,
)
