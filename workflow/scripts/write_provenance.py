"""Rule write_provenance: manifest.json, REPLICATION.md, the environment's lock and a container recipe."""

from fegrid.grid import load_config
from fegrid.pipeline import provenance, run_logged

snakemake = globals()["snakemake"]
run_logged(snakemake.log[0], provenance, load_config(snakemake.config), dict(snakemake.config),
           snakemake.params.config_path, dict(snakemake.input.items()), snakemake.params.benchmarks,
           dict(snakemake.output.items()), snakemake.params.specs, snakemake.params.snapshot)
