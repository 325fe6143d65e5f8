"""Rule render_appendix: appendix.tex (compiles alone, or \\input into a paper) and the results tables."""

from fegrid.grid import load_config
from fegrid.pipeline import appendix, run_logged

snakemake = globals()["snakemake"]
grid = load_config(snakemake.config)
tables = {}
for key, path in snakemake.output.items():
    if key.startswith("table_"):
        name, ending = key[len("table_"):].rsplit("_", 1)
        tables.setdefault(name, {})[ending] = path
run_logged(snakemake.log[0], appendix, grid, snakemake.input.ledger, snakemake.input.joint, snakemake.output.tex,
           tables)
