"""Rule draw_curve: the specification-curve figure of one outcome x focal pair (PNG and PDF)."""

from fegrid.grid import load_config
from fegrid.pipeline import draw_figure, run_logged

snakemake = globals()["snakemake"]
run_logged(snakemake.log[0], draw_figure, load_config(snakemake.config), snakemake.input.ledger,
           snakemake.wildcards.pair, snakemake.output.png, snakemake.output.pdf)
