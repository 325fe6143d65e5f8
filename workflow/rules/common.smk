# Parse time: check the config, resolve the grid against the data, name every job's file.
import os
import time
from pathlib import Path

from snakemake.exceptions import WorkflowError

from fegrid import defaults, keys, pipeline, renames
from fegrid.errors import FegridError
from fegrid.locations import pdflatex
from fegrid.lock import RunLock
from fegrid.store import RunPaths


# spellings renamed in 0.3 (a deprecation message each), so the schema check below sees the new ones
_MODERN = renames.modernise(config)
config.clear()
config.update(_MODERN)

# one job, one declared thread, one thread in its linear algebra (see pipeline.JOB_THREAD_VARIABLES)
for _variable in pipeline.JOB_THREAD_VARIABLES:
    os.environ.setdefault(_variable, "1")

try:
    if workflow.is_main_process:
        # plan once; the jobs read the saved plan (and their own specifications) instead of
        # expanding the grid again
        PLAN, _SAVED = pipeline.plan_for_workflow(config)
        os.environ[pipeline.PLAN_ENV] = str(_SAVED.resolve())
    else:
        PLAN = pipeline.plan_for_job(config)
except FegridError as exc:
    raise WorkflowError(f"fegrid: {exc}") from None
# the schema's defaults filled in, as the plan's own reading of the config does (the plan above checked the
# config against the schema; Snakemake's validate would parse the schema again, in pure Python, at every start)
_FILLED = defaults.fill_defaults(config)
config.clear()
config.update(_FILLED)


if workflow.is_main_process and not workflow.dryrun:
    # the run's wall time in the manifest counts from here; jobs inherit the variable
    os.environ.setdefault(pipeline.RUN_STARTED_ENV, repr(time.time()))
    # a plain `snakemake` takes the run folder's lock too, so it never works beside a `fegrid run`
    # (which holds the lock itself and tells its Snakemake so)
    if not os.environ.get(RunLock.HELD_ENV):
        try:
            _RUN_LOCK = RunLock(PLAN.paths.lock).acquire()
        except FegridError as exc:
            raise WorkflowError(f"fegrid: {exc}") from None
# what the ledger shows besides fitted numbers (choice names, baseline): reruns only the gathering
GRID_DIGEST = keys.config_digest(config)


# the config file named in REPLICATION.md's instructions
CONFIG_PATH = os.path.relpath(workflow.configfiles[-1]) if workflow.configfiles else "config/config.yaml"
# the PDF of the appendix is built where pdflatex is installed; appendix.tex always is
BUILD_PDF = pdflatex() is not None


# cluster resources of a fit job, from its size: rows x columns read, and specifications fitted
_DATA_MB = os.path.getsize(PLAN.grid.data_path) / 1e6
_SPECS = PLAN.job_sizes


def fit_mem_mb(wildcards):
    """Memory of a fit job: the data and its demeaned copies (about 30x the file), plus a base."""
    return int(600 + 30 * _DATA_MB)


def fit_runtime(wildcards):
    """Minutes for a fit job: a base plus a generous allowance per specification and data size."""
    return int(10 + _SPECS.get(wildcards.job, 0) * (0.01 + _DATA_MB / 2000))


def report_outputs(wildcards=None):
    """Every output of the run but the provenance files, by name (the package names them)."""
    return {name: str(path) for name, path in PLAN.report_outputs(build_pdf=BUILD_PDF).items()}


def benchmark_files():
    """The benchmark files of the current run's jobs (wall time and memory per stage)."""
    return [str(f) for f in PLAN.benchmark_files(build_pdf=BUILD_PDF)]


def log_of(stage, name=""):
    """A rule's log, from the package's run-folder layout (the stage name is checked)."""
    return str(PLAN.paths.log(pipeline.stage(stage), name))


def benchmark_of(stage, name="all"):
    """A rule's benchmark file, from the package's run-folder layout (the rule name is checked). The
    provenance step has one too (its wall time, for benchmarks); the manifest it writes cannot hold it."""
    return str(PLAN.paths.benchmark(pipeline.stage(stage), name))


def first_answer():
    """The outputs a user waits for: the ledger, its summary and the curve figures."""
    return [str(PLAN.paths.ledger_parquet), str(PLAN.paths.file("summary.csv"))] + [
        str(p) for p in PLAN.figure_paths("png") + PLAN.adoption_figure_paths("png")]


def final_outputs():
    return [str(p) for p in PLAN.declared_outputs(build_pdf=BUILD_PDF).values()]


# a finished run ends with its last job: Snakemake's scheduler leaves a timer that the interpreter
# would wait out (up to a second) before exiting
onsuccess:
    pipeline.cancel_pending_timers()


onerror:
    pipeline.cancel_pending_timers()
