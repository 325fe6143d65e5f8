"""Rule test_curve: joint tests across the curve from the ledger and the bootstrap draws."""

from fegrid.grid import load_config
from fegrid.pipeline import run_logged, test_curve

snakemake = globals()["snakemake"]
run_logged(snakemake.log[0], test_curve, load_config(snakemake.config), snakemake.input.ledger,
           list(snakemake.input.draws), snakemake.output.csv, snakemake.output.md)
