# Parse time: check the config, resolve the grid against the data, name every job's file.
import hashlib
import json
import os
import shutil
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


# the config file named in REPLICATION.md's instructions
CONFIG_PATH = os.path.relpath(workflow.configfiles[-1]) if workflow.configfiles else "config/config.yaml"
# the PDF of the appendix is built where pdflatex is installed; appendix.tex always is
BUILD_PDF = shutil.which("pdflatex") is not None


# cluster resources of a fit job, from its size: rows x columns read, and specifications fitted
_DATA_MB = os.path.getsize(PLAN.grid.data_path) / 1e6
_SPECS = {job.key: len(job.specs) for job in PLAN.jobs}


def fit_mem_mb(wildcards):
    """Memory of a fit job: the data and its demeaned copies (about 30x the file), plus a base."""
    return int(600 + 30 * _DATA_MB)


def fit_runtime(wildcards):
    """Minutes for a fit job: a base plus a generous allowance per specification and data size."""
    return int(10 + _SPECS.get(wildcards.job, 0) * (0.01 + _DATA_MB / 2000))


def report_outputs(wildcards=None):
    """Every output of the run but the provenance files, by name."""
    paths = PLAN.paths
    out = {
        "ledger_csv": paths.ledger_csv,
        "ledger_parquet": paths.ledger_parquet,
        "summary_csv": paths.file("summary.csv"),
        "summary_md": paths.file("summary.md"),
        "summary_tex": paths.file("summary.tex"),
        "choices_csv": paths.file("choices.csv"),
        "influence_csv": paths.file("influence.csv"),
        "joint_csv": paths.file("joint_tests.csv"),
        "joint_md": paths.file("joint_tests.md"),
        "appendix_tex": paths.file("appendix.tex"),
    }
    if BUILD_PDF:
        out["appendix_pdf"] = paths.file("appendix.pdf")
    for (outcome, focal), png, pdf in zip(PLAN.pairs, PLAN.figure_paths("png"), PLAN.figure_paths("pdf")):
        out[f"figure_{outcome}_{focal}_png"] = png
        out[f"figure_{outcome}_{focal}_pdf"] = pdf
    return {name: str(path) for name, path in out.items()}


def benchmark_files():
    """The benchmark files of the current run's jobs (wall time and memory per stage)."""
    b = PLAN.paths.benchmark
    files = [b("snapshot_data", "all"), b("gather_ledger", "all"), b("summarise_curve", "all"),
             b("test_curve", "all"), b("render_appendix", "all")]
    files += [b("fit_job", job.key) for job in PLAN.jobs]
    files += [b("draw_curve", p.stem.removeprefix("curve-")) for p in PLAN.figure_paths("png")]
    files += [b("draw_null_curves", f"{p.parent.name}-{p.stem.removeprefix('draws-')}") for p in PLAN.joint_paths()]
    if BUILD_PDF:
        files.append(b("compile_appendix", "all"))
    return [str(f) for f in files]


def final_outputs():
    return list(report_outputs().values()) + [
        str(PLAN.paths.file("manifest.json")),
        str(PLAN.paths.file("REPLICATION.md")),
    ]
