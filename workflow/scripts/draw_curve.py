"""Rule draw_curve: the specification-curve figure of every outcome x focal pair (PNG and PDF)."""

from fegrid.grid import load_config
from fegrid.pipeline import draw_figures, run_logged

snakemake = globals()["snakemake"]
run_logged(snakemake.log[0], draw_figures, load_config(snakemake.config), snakemake.input.ledger,
           list(snakemake.output.png), list(snakemake.output.pdf))
