"""Rule summarise_curve: summary.csv / .md / .tex and choices.csv from the ledger."""

from pathlib import Path

from fegrid.grid import load_config
from fegrid.pipeline import run_logged, summarise

snakemake = globals()["snakemake"]
run_logged(snakemake.log[0], summarise, load_config(snakemake.config), snakemake.input.ledger,
           Path(snakemake.output.csv).parent)
