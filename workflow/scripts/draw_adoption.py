"""Rule draw_adoption: the event-study and decomposition figures of one staggered design (PNG and PDF)."""

from fegrid.grid import load_config
from fegrid.pipeline import draw_adoption, run_logged

snakemake = globals()["snakemake"]
run_logged(snakemake.log[0], draw_adoption, load_config(snakemake.config), snakemake.input.ledger,
           snakemake.input.coefficients, snakemake.wildcards.design, dict(snakemake.output.items()))
