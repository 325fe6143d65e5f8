"""Rule render_appendix: appendix.tex (compiles alone, or \\input into a paper)."""

from fegrid.grid import load_config
from fegrid.pipeline import appendix, run_logged

snakemake = globals()["snakemake"]
run_logged(snakemake.log[0], appendix, load_config(snakemake.config), snakemake.input.ledger,
           snakemake.input.joint, snakemake.output.tex)
