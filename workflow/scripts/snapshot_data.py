"""Rule snapshot_data: check the data against the grid and write its Parquet snapshot."""

from fegrid.grid import load_config
from fegrid.pipeline import run_logged, snapshot_data

snakemake = globals()["snakemake"]
run_logged(snakemake.log[0], snapshot_data, load_config(snakemake.config), snakemake.output.snapshot,
           snakemake.params.data_sha256)
