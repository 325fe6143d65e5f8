# Parse time: check the config, resolve the grid against the data, name every job's file.
import hashlib
import json
from pathlib import Path

from snakemake.exceptions import WorkflowError
from snakemake.utils import validate

from fegrid import pipeline
from fegrid.errors import FegridError


try:
    PLAN = pipeline.make_plan(config, prepare=True)
except FegridError as exc:
    raise WorkflowError(f"fegrid: {exc}") from None
validate(config, "../schemas/config.schema.yaml")

RUN = str(PLAN.paths.run)
# what the ledger shows besides fitted numbers (choice names, baseline): reruns only the gathering
GRID_DIGEST = hashlib.sha256(json.dumps(config, sort_keys=True, default=str).encode()).hexdigest()


def final_outputs():
    return [str(PLAN.paths.ledger_csv), str(PLAN.paths.ledger_parquet)]
