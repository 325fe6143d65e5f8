"""Rule gather_ledger: join every job's results into reports/<run>/ledger.csv and .parquet."""

from fegrid.grid import load_config
from fegrid.pipeline import gather_ledger, run_logged
from fegrid.store import RunPaths

snakemake = globals()["snakemake"]
grid = load_config(snakemake.config)
paths = RunPaths(snakemake.params.root, grid.run_name)
run_logged(snakemake.log[0], gather_ledger, grid, snakemake.input.snapshot, snakemake.input.fits, paths)
