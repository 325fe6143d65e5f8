"""Rule draw_null_curves: one chunk of bootstrap draws of the whole grid (joint inference)."""

from fegrid.grid import load_config
from fegrid.pipeline import draw_null_chunk, run_logged

snakemake = globals()["snakemake"]
run_logged(snakemake.log[0], draw_null_chunk, load_config(snakemake.config), snakemake.input.snapshot,
           snakemake.wildcards.key, int(snakemake.wildcards.chunk), snakemake.output.draws)
