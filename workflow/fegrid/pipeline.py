"""The steps the Snakemake rules and the command line call: plan, snapshot, fit a job, gather.

Content addressing makes reruns cheap and safe. The data snapshot is named by the hash of the data
file's bytes and the columns used; a job's results file by the hash of that snapshot, the engine's
settings and its specifications' canonical content. A file that exists under its name is therefore
up to date whatever its time stamp, and a changed job gets a new name. Demeaned columns live in a
store keyed the same way, so a job whose specifications changed (say, a clustering was added)
refits without demeaning anything again.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import pickle
import threading
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import asdict, dataclass, is_dataclass, replace
from functools import cached_property
from pathlib import Path
from typing import Any

import pandas as pd

from . import keys
from .coefficients import STORED_COLUMN as COEFFICIENTS
from .coefficients import coefficient_table, encode, evaluate_combinations
from .data import (
    CsvOptions,
    check_columns,
    check_data,
    file_columns,
    file_sha256,
    levels_for,
    read_table,
    require_file,
)
from .defaults import fill_defaults
from .demo import is_current_demo, write_demo_data
from .errors import ConfigError, DataError, FegridError
from .estimate import RESULT_COLUMNS, fit_block, read_columns
from .grid import Grid, Job, Spec, load_config, plan_jobs, spec_table
from .ledger import DEFAULT_CURVE, DIMENSIONS, LEDGER_COLUMNS, read_ledger
from .locations import SOURCE_CHECKOUT
from .memory import reuse_freed_memory
from .periods import period_numbers
from .samples import apply_sample
from .store import (
    REPORTS_ROOT,
    FileDemeanStore,
    FileResultStore,
    RunPaths,
    atomic_write,
    pair_slug,
    read_fegrid_metadata,
    write_csv,
    write_json,
    write_parquet,
    write_text,
)
from .threads import THREAD_VARIABLES

__all__ = [
    "Plan",
    "make_plan",
    "save_plan",
    "load_plan",
    "plan_for_job",
    "plan_for_workflow",
    "PLAN_ENV",
    "load_checked",
    "snapshot_data",
    "snapshot_sha256",
    "fit_job",
    "gather_ledger",
    "plan_status",
    "run_logged",
    "cancel_pending_timers",
    "STAGES",
    "RULES",
    "stage",
    "result_keys",
    "fitted_specs",
    "ContentKeys",
    "fit_grid",
    "JobWork",
    "PlanStatus",
]



@dataclass(frozen=True)
class _PlanFacts:
    """What the rules need of a plan's specifications, kept so that a job can parse the Snakefile
    without loading every specification (see :meth:`Plan.for_rules`)."""

    n_specs: int
    pairs: tuple[tuple[str, str, str], ...]
    adoption: tuple[tuple[str, str], ...]
    joint_key: str
    job_sizes: dict[str, int]


@dataclass(frozen=True)
class Plan:
    """A grid resolved against its data file: specifications, jobs and file names."""

    grid: Grid
    data_sha256: str
    snapshot_key: str
    specs: tuple[Spec, ...]
    jobs: tuple[Job, ...]
    paths: RunPaths
    facts: _PlanFacts | None = None

    @property
    def snapshot_path(self) -> Path:
        return self.paths.snapshot(self.snapshot_key)

    @property
    def n_specs(self) -> int:
        return self.facts.n_specs if self.facts else len(self.specs)

    @property
    def job_sizes(self) -> dict[str, int]:
        """Specifications per fit job, by job key."""
        return self.facts.job_sizes if self.facts else {j.key: len(j.specs) for j in self.jobs}

    @property
    def pairs(self) -> list[tuple[str, str, str]]:
        """The grid's curves (outcome, focal regressor, curve), sorted."""
        return list(self.facts.pairs) if self.facts else list(self._pairs)

    @cached_property
    def _pairs(self) -> tuple[tuple[str, str, str], ...]:
        return tuple(sorted({(s.outcome, s.focal, s.curve) for s in self.specs}))

    @property
    def joint_key(self) -> str:
        return self.facts.joint_key if self.facts else joint_key(self.grid, self.snapshot_key, self.specs)

    def for_rules(self) -> Plan:
        """The same plan without its specifications: all that the rules of a job's parse need."""
        facts = _PlanFacts(self.n_specs, tuple(self.pairs), tuple(self.adoption_designs), self.joint_key,
                           self.job_sizes)
        return replace(self, specs=(), jobs=tuple(Job(j.key, ()) for j in self.jobs), facts=facts)

    @property
    def adoption_designs(self) -> list[tuple[str, str]]:
        """The staggered designs (outcome, treatment): fits of the declared treatment, sorted."""
        if self.facts:
            return list(self.facts.adoption)
        treatment = self.grid.panel.treatment
        return sorted({(s.outcome, s.focal) for s in self.specs if treatment and s.focal == treatment})

    def figure_paths(self, ext: str) -> list[Path]:
        return [self.paths.figure(pair_slug(*pair), ext) for pair in self.pairs]

    def adoption_figure_paths(self, ext: str) -> list[Path]:
        """The staggered designs' figures: the event study, then the decomposition, of each design."""
        return [self.paths.adoption_figure(kind, pair_slug(*design), ext) for design in self.adoption_designs
                for kind in ("event", "decomposition")]

    def joint_paths(self) -> list[Path]:
        return [self.paths.joint_draws(self.joint_key, i) for i in range(len(self.grid.draw_chunks()))]

    def fit_paths(self) -> list[Path]:
        return [self.paths.fit(j.key) for j in self.jobs]

    def report_outputs(self, *, build_pdf: bool) -> dict[str, Path]:
        """Every declared output of the run but the provenance files, by name."""
        paths = self.paths
        out = {
            "ledger_csv": paths.ledger_csv,
            "ledger_parquet": paths.ledger_parquet,
            "coefficients_parquet": paths.coefficients_parquet,
            "coefficients_csv": paths.coefficients_csv,
            "summary_csv": paths.file("summary.csv"),
            "summary_md": paths.file("summary.md"),
            "summary_tex": paths.file("summary.tex"),
            "choices_csv": paths.file("choices.csv"),
            "influence_csv": paths.file("influence.csv"),
            "joint_csv": paths.file("joint_tests.csv"),
            "joint_md": paths.file("joint_tests.md"),
            "appendix_tex": paths.file("appendix.tex"),
        }
        if build_pdf:
            out["appendix_pdf"] = paths.file("appendix.pdf")
        out.update({f"table_{name}_{ending}": path for name, files in self.table_paths().items()
                    for ending, path in files.items()})
        for (outcome, focal, curve), png, pdf in zip(self.pairs, self.figure_paths("png"), self.figure_paths("pdf")):
            name = f"figure_{outcome}_{focal}" + ("" if curve == DEFAULT_CURVE else f"_{curve}")
            out[f"{name}_png"] = png
            out[f"{name}_pdf"] = pdf
        for outcome, focal in self.adoption_designs:
            for kind in ("event", "decomposition"):
                for ext in ("png", "pdf"):
                    out[f"{kind}_{outcome}_{focal}_{ext}"] = self.paths.adoption_figure(kind, pair_slug(outcome, focal),
                                                                                       ext)
        return out

    def job_names(self, *, build_pdf: bool) -> dict[str, list[str]]:
        """The name of every job of each stage in this run (what its log and benchmark are called)."""
        names = {
            "snapshot_data": ["all"], "fit_job": [j.key for j in self.jobs], "gather_ledger": ["all"],
            "draw_curve": ["all"] if self.pairs else [], "summarise_curve": ["all"],
            "draw_adoption": [pair_slug(*design) for design in self.adoption_designs],
            "draw_null_curves": [f"{self.joint_key}-{i:04d}" for i in range(len(self.joint_paths()))],
            "test_curve": ["all"], "render_appendix": ["all"], "compile_appendix": ["all"] if build_pdf else [],
        }
        assert set(names) == set(STAGES), "every stage names its jobs"
        return names

    def benchmark_files(self, *, build_pdf: bool) -> list[Path]:
        """The benchmark file of every job of this run, stage by stage."""
        names = self.job_names(build_pdf=build_pdf)
        return [self.paths.benchmark(st, n) for st in STAGES for n in names[st]]

    def table_paths(self) -> dict[str, dict[str, Path]]:
        """Every results table of the config in every format: ``{name: {ending: path}}``."""
        from .tables import TABLE_FORMATS

        return {name: {ending: self.paths.table(name, ending) for ending in TABLE_FORMATS}
                for name in sorted(self.grid.raw.get("tables") or {})}

    def declared_outputs(self, *, build_pdf: bool) -> dict[str, Path]:
        """Every output a finished run holds, provenance included: what a round archives."""
        return {**self.report_outputs(build_pdf=build_pdf), **self.paths.provenance_files()}


#: The pipeline's stages (its Snakemake rules) whose jobs are timed for the manifest, in order.
#: Every rule but ``all`` and ``write_provenance`` is one of them (a test checks the Snakefile).
STAGES: tuple[str, ...] = ("snapshot_data", "fit_job", "gather_ledger", "draw_curve", "summarise_curve",
                           "draw_adoption", "draw_null_curves", "test_curve", "render_appendix", "compile_appendix")


#: Every rule that runs a job: the timed stages, then the provenance step (which times the others).
RULES: tuple[str, ...] = (*STAGES, "write_provenance")


def stage(name: str) -> str:
    """``name`` if it is one of :data:`RULES`; a rule file naming another fails at parse time."""
    if name not in RULES:
        raise FegridError(f"'{name}' is not a pipeline stage; the stages are: {', '.join(RULES)}.")
    return name


def _salt(snapshot_key: str, grid: Grid) -> str:
    return keys.settings_digest(grid.settings_key(), snapshot_key)


class ContentKeys:
    """Result keys of specifications from the content of the data they read.

    A specification's key hashes the settings, its canonical content and the keys of the columns
    that its block (the specifications of its job with the same sample, effects and weights) reads
    on the rows of its sample (see :mod:`fegrid.keys`). A block's specifications share designs, and
    a shared design's QR factor holds all their columns, so every column of the block can move the
    last digits of each result: keying on the block's columns keeps an incremental refit
    byte-identical to a cold run. A corrected value therefore refits exactly the blocks whose
    sample and columns hold it, and a column the grid does not read changes nothing.
    """

    def __init__(self, grid: Grid, frame: pd.DataFrame) -> None:
        self.grid = grid
        self.frame = frame
        self.settings = grid.settings_key()
        self._samples: dict[str, pd.DataFrame] = {}
        self._columns: dict[tuple[str, str], str] = {}

    def sample(self, spec: Spec) -> pd.DataFrame:
        name = json.dumps(spec.sample.canonical(), sort_keys=True)
        if name not in self._samples:
            self._samples[name] = apply_sample(self.frame, spec.sample, self.grid.panel)
        return self._samples[name]

    def _block_content(self, block: Sequence[Spec]) -> str:
        sample = self.sample(block[0])
        name = json.dumps(block[0].sample.canonical(), sort_keys=True)
        settings = self.grid.block_settings(block[0])
        read = sorted({c for s in block for c in read_columns(s.request(), settings, list(sample.columns))})
        for col in read:
            if (name, col) not in self._columns:
                self._columns[(name, col)] = keys.column_key(sample[col])
        return keys.content_key({col: self._columns[(name, col)] for col in read})

    def of_job(self, job: Job) -> dict[str, str]:
        """Result key of every specification of a job, by spec id."""
        blocks: dict[str, list[Spec]] = {}
        for spec in job.specs:
            blocks.setdefault(spec.block_key, []).append(spec)
        out = {}
        for block in blocks.values():
            content = self._block_content(block)
            out.update({s.spec_id: keys.result_key(self.settings, s.canonical, content) for s in block})
        return out


def result_keys(grid: Grid, frame: pd.DataFrame, jobs: Sequence[Job]) -> dict[str, str]:
    """Result key of every specification of the jobs, by spec id (see :class:`ContentKeys`)."""
    content = ContentKeys(grid, frame)
    return {sid: key for job in jobs for sid, key in content.of_job(job).items()}


def _plan_place(config: str | Path | Mapping[str, Any], *, root: str | Path,
                prepare: bool) -> tuple[Grid, str, RunPaths, Path]:
    """The checked config, its data file's hash (the demo's data written first with ``prepare``), the run's
    paths and the file its saved plan has (or would have)."""
    grid = load_config(config)
    path = Path(grid.data_path)
    if prepare and grid.raw["data"].get("demo") and not is_current_demo(path):
        write_demo_data(path)
    require_file(path)
    data_sha = file_sha256(path)
    paths = RunPaths(Path(root), grid.run_name)
    return grid, data_sha, paths, paths.plan_file(keys.plan_key(grid.raw, data_sha))


def plan_for_workflow(config: Mapping[str, Any], *, root: str | Path = REPORTS_ROOT) -> tuple[Plan, Path]:
    """The plan of the workflow's main process, in the form its rules need (:meth:`Plan.for_rules`, no
    specifications), and the file of the saved full plan (for :data:`PLAN_ENV`). Read back when ``fegrid run``
    saved it for this config and data (reading the full plan of 10,000 specifications, and listing its
    curves from them, took a tenth of a second of every start), else planned and saved here."""
    grid, data_sha, paths, saved = _plan_place(config, root=root, prepare=True)
    if saved.is_file() and _rules_file(saved).is_file():
        try:
            return replace(load_plan(_rules_file(saved)), paths=paths), saved
        except (OSError, EOFError, pickle.UnpicklingError, AttributeError, TypeError):
            pass  # unreadable: plan again
    plan = _plan_at(grid, data_sha, paths, saved)
    return plan.for_rules(), save_plan(plan)


def make_plan(config: str | Path | Mapping[str, Any], *, root: str | Path = REPORTS_ROOT,
              prepare: bool = False) -> Plan:
    """Read the config, hash the data file and expand the grid into jobs (no fitting).

    With ``prepare``, a config whose ``data.demo`` is true gets the invented demo data written to
    ``data.path`` when that file is missing. A plan saved for the same config, data file and
    version (:func:`save_plan`) is read back instead of expanding the grid again.
    """
    return _plan_at(*_plan_place(config, root=root, prepare=prepare))


def _plan_at(grid: Grid, data_sha: str, paths: RunPaths, saved: Path) -> Plan:
    """:func:`make_plan` once the config is read and the data hashed (:func:`_plan_place`)."""
    path = Path(grid.data_path)
    if saved.is_file():
        try:
            return replace(load_plan(saved), paths=paths)
        except (OSError, EOFError, pickle.UnpicklingError, AttributeError, TypeError):
            pass  # unreadable (interrupted write, another fegrid): plan again
    levels: dict[str, list] = {}
    if grid.level_columns():
        levels = levels_for(_read_grid_table(grid, grid.level_columns()), grid)
    specs = grid.expand(levels)
    grid.baseline_id(specs)
    key = keys.snapshot_key(data_sha, grid.columns(), grid.reading())
    jobs = plan_jobs(specs, specs_per_job=grid.specs_per_job, salt=_salt(key, grid))
    plan = Plan(grid, data_sha, key, tuple(specs), tuple(jobs), paths)
    # a misspelt column is named as such, before the tables and exhibits that it would also break
    check_columns(file_columns(path, csv=CsvOptions(**grid.csv)), grid, path=f"the data file '{grid.data_path}'")
    if grid.raw.get("tables"):  # every column of every table names one specification (no fitting needed)
        from .tables import table_specs

        frame = spec_table(grid, specs)
        for name, body in grid.raw["tables"].items():
            table_specs(frame, body, name=name)
    exhibits = (grid.raw.get("replication") or {}).get("exhibits") or {}
    outputs = plan.report_outputs(build_pdf=True)
    unknown = sorted(set(exhibits) - set(outputs))
    if unknown:
        raise ConfigError(f"replication.exhibits names output(s) {', '.join(repr(u) for u in unknown)} that this grid "
                          f"does not write; its outputs are: {', '.join(outputs)}.")
    return plan


#: Environment variable naming the resolved plan of the running Snakemake run (set by the main
#: process at parse time; its jobs inherit it and read the plan instead of expanding the grid).
PLAN_ENV = "FEGRID_PLAN_FILE"

#: Environment variables that size the linear-algebra libraries' thread pools. Every job declares one
#: thread and Snakemake runs as many jobs side by side as it has cores, so each job's pool gets one
#: thread (unless the user set them): a pool per job would spin on cores that other jobs use.
JOB_THREAD_VARIABLES = THREAD_VARIABLES


def save_plan(plan: Plan) -> Path:
    """Keep a resolved plan, its slim form for the rules and each job's specifications in the run's
    cache (content-addressed); returns the full plan's file."""
    path = plan.paths.plan_file(keys.plan_key(plan.grid.raw, plan.data_sha256))
    if not path.is_file():
        for job in plan.jobs:
            job_file = plan.paths.job_specs(job.key)
            if not job_file.is_file():
                atomic_write(job_file, lambda fh, job=job: pickle.dump(job.specs, fh), durable=False)
        slim = plan.for_rules()
        atomic_write(_rules_file(path), lambda fh: pickle.dump(slim, fh), durable=False)
        atomic_write(path, lambda fh: pickle.dump(plan, fh), durable=False)
    return path


def _rules_file(plan_file: Path) -> Path:
    return plan_file.with_name(plan_file.stem + "-rules.pkl")


def load_plan(path: str | Path) -> Plan:
    with open(path, "rb") as fh:
        return pickle.load(fh)  # noqa: S301 - our own cache, named by the hash of its content


def plan_for_job(config: Mapping[str, Any]) -> Plan:
    """The plan a Snakemake job process needs: the one its run saved when the config matches
    (see :data:`PLAN_ENV`), else a fresh one."""
    saved = os.environ.get(PLAN_ENV)
    if saved and _rules_file(Path(saved)).is_file():
        plan = load_plan(_rules_file(Path(saved)))
        if keys.config_digest(plan.grid.raw) == keys.config_digest(fill_defaults(config)):
            return plan
    return make_plan(config, prepare=True)


def _specs_of(grid: Grid, snapshot: Path, frame: pd.DataFrame) -> tuple[Spec, ...]:
    """The grid's specifications: from the run's saved plan when there is one for this snapshot."""
    saved = os.environ.get(PLAN_ENV)
    if saved and Path(saved).is_file():
        plan = load_plan(saved)
        if plan.snapshot_key == snapshot.stem and plan.grid.settings_key() == grid.settings_key():
            return plan.specs
    return tuple(grid.expand(levels_for(frame, grid)))


def _read_grid_table(grid: Grid, columns: Sequence[str], content: bytes | None = None) -> pd.DataFrame:
    """The grid's data file (or its bytes already read), only ``columns``, with the config's CSV options;
    a dated time column (``data.time_frequency``) numbered by period (see :mod:`fegrid.periods`)."""
    frame = read_table(grid.data_path, columns, content=content, csv=CsvOptions(**grid.csv))
    time, frequency = grid.panel.time, grid.panel.frequency
    if frequency is not None and time in frame.columns:
        frame[time] = period_numbers(frame[time], frequency, column=time)
    return frame


def load_checked(grid: Grid) -> pd.DataFrame:
    """Read the grid's columns from the data file and check them (see :func:`check_data`)."""
    frame = _read_grid_table(grid, grid.columns())
    check_data(frame, grid, path=f"the data file '{grid.data_path}'")
    return frame


def snapshot_data(grid: Grid, out: str | Path, expected_sha256: str | None = None) -> None:
    """Check the data and write the grid's columns as a Parquet snapshot.

    The file is read once: the bytes hashed are the bytes parsed, and the snapshot records their
    SHA-256 (see :func:`snapshot_sha256`). When the file's hash differs from ``expected_sha256``
    (the hash the run was planned with, which names the snapshot), the file changed after the run
    started: nothing is written, so a snapshot never holds other data than its name says.
    """
    path = Path(grid.data_path)
    require_file(path)
    content = path.read_bytes()
    actual = hashlib.sha256(content).hexdigest()
    if expected_sha256 is not None and actual != expected_sha256:
        raise DataError(
            f"The data file '{path}' changed after this run was planned (SHA-256 {expected_sha256[:12]}... when "
            f"planned, {actual[:12]}... now); nothing was fitted from it. Run again to fit the file as it is now."
        )
    frame = _read_grid_table(grid, grid.columns(), content=content)
    check_data(frame, grid, path=f"the data file '{grid.data_path}'")
    frame.attrs = {}  # the file's column list is for messages; the snapshot holds data only
    write_parquet(out, frame.reset_index(drop=True),
                  fegrid_metadata={"data_path": str(path), "data_sha256": actual, "rows": len(frame)})


def snapshot_sha256(snapshot: str | Path) -> str | None:
    """SHA-256 of the data file's bytes from which a snapshot was made (None for old snapshots)."""
    return read_fegrid_metadata(snapshot).get("data_sha256")


def _jobs_from_snapshot(grid: Grid, snapshot: Path, frame: pd.DataFrame) -> list[Job]:
    return plan_jobs(_specs_of(grid, snapshot, frame), specs_per_job=grid.specs_per_job,
                     salt=_salt(snapshot.stem, grid))


@dataclass(frozen=True)
class JobWork:
    """What one fit job did (its work log, beside its results file, and a row of timings.csv)."""

    job: str
    specs: int
    specs_fitted: int
    specs_reused: int
    designs: int
    columns_demeaned: int
    columns_reused: int
    fit_seconds: float  # inside the engine
    seconds: float  # the whole step: reading the snapshot and the job's specifications too


def fit_job(grid: Grid, snapshot: str | Path, job_key: str, out: str | Path,
            store_dir: str | Path | None = None) -> JobWork:
    """Fit the specifications of one job and write their results (Parquet, one row per spec).

    With ``store_dir`` (the run's cache folder), specifications whose results are stored are not
    fitted again, and demeaned columns are reused; the work log beside ``out`` counts both.
    """
    started = time.perf_counter()
    snapshot = Path(snapshot)
    frame = pd.read_parquet(snapshot)
    job_file = Path(store_dir) / "jobs" / f"{job_key}.pkl" if store_dir is not None else None
    if job_file is not None and job_file.is_file():  # written at plan time: no re-expansion of the grid
        with open(job_file, "rb") as fh:
            jobs = {job_key: Job(job_key, pickle.load(fh))}  # noqa: S301 - our own content-addressed cache
    else:
        jobs = {j.key: j for j in _jobs_from_snapshot(grid, snapshot, frame)}
    if job_key not in jobs:
        raise FegridError(
            f"Job {job_key} is not part of the grid any more (the config or data changed during the "
            "run). Run again."
        )
    store = FileDemeanStore(Path(store_dir) / "demeaned") if store_dir is not None else None
    results_store = FileResultStore(Path(store_dir) / "results") if store_dir is not None else None
    content = ContentKeys(grid, frame)
    rows: dict[str, dict[str, Any]] = {}
    result_key_of = content.of_job(jobs[job_key])
    by_block: dict[str, list[Spec]] = {}
    todo: set[str] = set()
    for spec in jobs[job_key].specs:
        # the whole block shapes its designs (and so the last digits of every result), whether
        # or not each of its specifications must be fitted
        by_block.setdefault(spec.block_key, []).append(spec)
        stored = results_store.get(result_key_of[spec.spec_id]) if results_store is not None else None
        if stored is not None:
            rows[spec.spec_id] = stored
        else:
            todo.add(spec.spec_id)
    designs = demeaned = reused_columns = fitted = 0
    fit_seconds = 0.0
    for bkey in sorted(by_block):
        specs = by_block[bkey]
        if not todo.intersection(s.spec_id for s in specs):
            continue
        fit_started = time.perf_counter()
        block = fit_block(content.sample(specs[0]), grid.block_settings(specs[0]),
                          [s.request() for s in specs], store=store, evaluate=todo)
        fit_seconds += time.perf_counter() - fit_started
        designs += block.designs
        demeaned += block.columns_demeaned
        reused_columns += block.columns_reused
        fitted += len(block.results)
        for res in block.results:
            record = {**res.record(), COEFFICIENTS: encode(block.coefficients.get(res.spec_id))}
            rows[res.spec_id] = record
            if results_store is not None:
                results_store.put(result_key_of[res.spec_id], record)
    results = pd.DataFrame([rows[k] for k in sorted(rows)], columns=[*RESULT_COLUMNS, COEFFICIENTS])
    log = JobWork(job=job_key, specs=len(results), specs_fitted=fitted, specs_reused=len(rows) - fitted,
                  designs=designs, columns_demeaned=demeaned, columns_reused=reused_columns,
                  fit_seconds=round(fit_seconds, 3), seconds=round(time.perf_counter() - started, 3))
    out = Path(out)
    write_json(out.with_suffix(".json"), asdict(log))
    write_parquet(out, results)
    return log


def gather_ledger(grid: Grid, snapshot: str | Path, fit_files: Iterable[str | Path],
                  paths: RunPaths) -> pd.DataFrame:
    """Join the jobs' results with the grid's names into the ledger (CSV and Parquet).

    The ledger is sorted by spec id and holds no timings, so the same inputs give the same bytes;
    the jobs' timings and work counts go to ``timings.csv``.
    """
    frame = pd.read_parquet(snapshot)
    table = spec_table(grid, _specs_of(grid, Path(snapshot), frame))
    fit_files = [Path(f) for f in fit_files]
    results = pd.concat([pd.read_parquet(f) for f in fit_files], ignore_index=True)
    encoded = dict(zip(results["spec_id"], results.pop(COEFFICIENTS))) if COEFFICIENTS in results else {}
    ledger = table.merge(results, on="spec_id", how="left", validate="one_to_one")
    missing = ledger["status"].isna()
    if missing.any():
        raise FegridError(f"{int(missing.sum())} specifications have no results; run the fit step again.")
    ledger = ledger[list(LEDGER_COLUMNS)].sort_values("spec_id", ignore_index=True)
    declared = grid.raw.get("combinations") or {}
    if declared:  # the config's linear combinations and joint tests, from the kept coefficients
        extra = evaluate_combinations(encoded, declared, grid.level)
        ledger = ledger.merge(extra, on="spec_id", how="left", validate="one_to_one")
    coefficients = coefficient_table(encoded, grid.level)
    write_parquet(paths.coefficients_parquet, coefficients)
    write_csv(paths.coefficients_csv, coefficients.drop(columns=["covariance"]))
    logs = [json.loads(f.with_suffix(".json").read_text()) for f in fit_files if f.with_suffix(".json").is_file()]
    write_csv(paths.timings, pd.DataFrame(logs).sort_values("job") if logs else pd.DataFrame())
    write_parquet(paths.ledger_parquet, ledger)
    write_csv(paths.ledger_csv, ledger)
    return ledger


def fit_grid(config: str | Path | Mapping[str, Any], *, root: str | Path = REPORTS_ROOT,
             say: Callable[[str], None] | None = None) -> tuple[Plan, pd.DataFrame]:
    """Snapshot, fit and gather a grid in this process, without Snakemake (the rules' own steps,
    run one after another); :func:`fegrid.fit_grid` is the public form. Paths are relative to the
    working directory, as in a Snakemake run; ``say`` gets one line per job."""
    plan = make_plan(config, root=root, prepare=True)
    save_plan(plan)
    if say is not None:
        say(f"run '{plan.grid.run_name}': {len(plan.specs)} specifications in {len(plan.jobs)} "
            f"job{'s' if len(plan.jobs) != 1 else ''}")
    snapshot_data(plan.grid, plan.snapshot_path, plan.data_sha256)
    for i, job in enumerate(plan.jobs, 1):
        work = fit_job(plan.grid, plan.snapshot_path, job.key, plan.paths.fit(job.key), plan.paths.cache)
        if say is not None:
            say(f"job {i} of {len(plan.jobs)}: {work.specs_fitted} specifications fitted, "
                f"{work.specs_reused} reused ({work.seconds:.2f} s)")
    return plan, gather_ledger(plan.grid, plan.snapshot_path, plan.fit_paths(), plan.paths)


def fitted_specs(plan: Plan, frame: pd.DataFrame | None = None) -> set[str]:
    """Ids of the specifications whose results are stored for the data as it is now."""
    frame = frame if frame is not None else load_checked(plan.grid)
    store = FileResultStore(plan.paths.results)
    return {sid for sid, key in result_keys(plan.grid, frame, plan.jobs).items() if store.has(key)}


@dataclass(frozen=True)
class PlanStatus:
    """How big a planned grid is and how much of it is fitted already."""

    run_name: str
    specifications: int
    sizes: dict[str, int]
    jobs: int
    jobs_done: int
    specs_fitted: int
    data_sha256: str

    @property
    def specs_to_fit(self) -> int:
        return self.specifications - self.specs_fitted


def plan_status(plan: Plan, frame: pd.DataFrame | None = None) -> PlanStatus:
    """Size per dimension, jobs, and how many specifications are already fitted."""
    return PlanStatus(
        run_name=plan.grid.run_name, specifications=len(plan.specs),
        sizes={d: len({s.name(d) for s in plan.specs}) for d in DIMENSIONS}, jobs=len(plan.jobs),
        jobs_done=sum(plan.paths.fit(j.key).is_file() for j in plan.jobs),
        specs_fitted=len(fitted_specs(plan, frame)), data_sha256=plan.data_sha256)


def describe_sizes(specs: Sequence[Spec]) -> list[tuple[str, int, str]]:
    """Per dimension: number of choices and their names (for the terminal)."""
    out = []
    for d in DIMENSIONS:
        names = sorted({s.name(d) for s in specs})
        shown = ", ".join(names[:6]) + (f", ... ({len(names) - 6} more)" if len(names) > 6 else "")
        out.append((d, len(names), shown))
    return out


def cancel_pending_timers() -> int:
    """Cancel the process's pending :class:`threading.Timer` threads; returns how many there were.

    Snakemake's scheduler starts a timer after every round of scheduling (to look again once its
    job-rate span, a second, has passed), and the interpreter waits for that timer before it exits:
    a finished run would end up to a second after its last job. The workflow's ``onsuccess`` and
    ``onerror`` handlers call this once no job is left to schedule.
    """
    timers = [t for t in threading.enumerate() if isinstance(t, threading.Timer) and t.is_alive()]
    for timer in timers:
        timer.cancel()
    return len(timers)


def run_logged(log: str | Path, step: Callable[..., Any], *args: Any) -> Any:
    """Run one pipeline step for a Snakemake rule, with its output and errors in the rule's log.

    A :class:`FegridError` (the user's mistake) is written as its one-paragraph message and ends
    the process with exit code 1; anything else keeps its traceback, since it is a bug.
    """
    reuse_freed_memory()  # a job's own process: see fegrid.memory
    log = Path(log)
    log.parent.mkdir(parents=True, exist_ok=True)
    with open(log, "w") as fh, contextlib.redirect_stderr(fh), contextlib.redirect_stdout(fh):
        try:
            result = step(*args)
        except FegridError as exc:
            print(f"fegrid: {exc}", file=fh)
            raise SystemExit(1) from None
        if is_dataclass(result) and not isinstance(result, type):
            result = asdict(result)
        if isinstance(result, dict):
            print(json.dumps(result, sort_keys=True), file=fh)
    return result


# ---- reports ---------------------------------------------------------------------------------------

def joint_key(grid: Grid, snapshot_key: str, specs: Sequence[Spec]) -> str:
    """Key of a grid's bootstrap draws: data, settings, specifications and the draws' settings."""
    return keys.joint_key(_salt(snapshot_key, grid), [grid.seed, grid.resample, grid.draws_per_job, grid.joint_method],
                          [s.canonical for s in specs])


def draw_figure(grid: Grid, ledger: str | Path | pd.DataFrame, slug: str, png: str | Path, pdf: str | Path) -> None:
    """The specification-curve figure of the outcome x focal pair named by ``slug``."""
    from .figures import draw_curve, save_curve  # matplotlib loads only in the jobs that draw

    led = ledger if isinstance(ledger, pd.DataFrame) else read_ledger(ledger)
    part = led[[pair_slug(o, f, c) == slug for o, f, c in zip(led["outcome"], led["focal"], led["curve"])]]
    if part.empty:
        raise FegridError(f"No specification of the ledger belongs to the pair '{slug}'.")
    save_curve(draw_curve(part, level=grid.level, labels=grid.raw.get("labels")), png, pdf)


def draw_figures(grid: Grid, ledger: str | Path, pngs: Sequence[str | Path], pdfs: Sequence[str | Path]) -> None:
    """Every specification-curve figure, in one job (the pair of each from its file name)."""
    led = read_ledger(ledger)
    for png, pdf in zip(pngs, pdfs):
        draw_figure(grid, led, RunPaths.figure_slug(png), png, pdf)


def draw_adoption(grid: Grid, ledger: str | Path, coefficients: str | Path, slug: str,
                  outputs: Mapping[str, str | Path]) -> None:
    """The event-study and decomposition figures of the staggered design named by ``slug``
    (``outputs``: ``event_png``, ``event_pdf``, ``decomposition_png``, ``decomposition_pdf``)."""
    from .adoption import adoption_designs, baseline_names, draw_decomposition, draw_event_study, representatives
    from .figures import save_curve

    led = read_ledger(ledger)
    found = [d for d in adoption_designs(led) if pair_slug(*d) == slug]
    labels = grid.raw.get("labels") or {}
    if found:
        outcome, focal = found[0]
        chosen = representatives(led, outcome, focal, baseline_names(grid.raw))
    else:  # every fit of the design failed: the figures say so
        outcome = focal = slug
        chosen = led.iloc[0:0]
    title = f"{labels.get(focal, focal)} on {labels.get(outcome, outcome)}"
    coefs = pd.read_parquet(coefficients, columns=["spec_id", "term", "estimate", "std_error", "ci_low", "ci_high"])
    save_curve(draw_event_study(chosen, coefs[coefs["spec_id"].isin(set(chosen["spec_id"]))], level=grid.level,
                                labels=labels, title=f"Event study: {title}"),
               outputs["event_png"], outputs["event_pdf"])
    reference = chosen.iloc[0] if len(chosen) and chosen.iloc[0]["decomposition"] else None
    save_curve(draw_decomposition(reference, title=f"Decomposition of the two-way estimate: {title}"),
               outputs["decomposition_png"], outputs["decomposition_pdf"])


def summarise(grid: Grid, ledger: str | Path, out_dir: str | Path) -> None:
    from .report import write_summaries

    write_summaries(read_ledger(ledger), grid.level, out_dir)


def draw_null_chunk(grid: Grid, snapshot: str | Path, key: str, chunk: int, out: str | Path) -> dict[str, Any]:
    """The bootstrap draws of job ``chunk`` (:meth:`Grid.draw_chunks`) of the whole grid (see :mod:`fegrid.joint`)."""
    from .joint import LINEARIZED, draw_curves, linearized_draws

    started, cpu_started = time.perf_counter(), time.process_time()
    snapshot = Path(snapshot)
    frame = pd.read_parquet(snapshot)
    specs = _specs_of(grid, snapshot, frame)
    if joint_key(grid, snapshot.stem, specs) != key:
        raise FegridError(f"The bootstrap draws {key} are not those of the current grid; run again.")
    draws = grid.draw_chunks()[chunk]
    method = linearized_draws if grid.joint_method == LINEARIZED else draw_curves
    table = method(grid, frame, specs, draws, seed=grid.seed, column=grid.resample)
    write_parquet(out, table)
    # the job's own clocks: Snakemake's benchmark samples CPU time now and then, and misses much of a job
    return {"chunk": chunk, "draws": len(draws), "seconds": round(time.perf_counter() - started, 3),
            "cpu_seconds": round(time.process_time() - cpu_started, 3)}


def test_curve(grid: Grid, ledger: str | Path, draw_files: Sequence[str | Path], out_csv: str | Path,
               out_md: str | Path) -> pd.DataFrame:
    """Joint tests of every outcome x focal pair from the ledger and the bootstrap draws."""
    from tabulate import tabulate

    from .joint import DRAW_COLUMNS, joint_tests, method_text, shared_cluster_caution

    led = read_ledger(ledger)
    draws = (pd.concat([pd.read_parquet(f) for f in draw_files], ignore_index=True) if draw_files
             else pd.DataFrame(columns=DRAW_COLUMNS))
    table = joint_tests(led, draws, grid.level) if draw_files else joint_tests(led.iloc[0:0], draws, grid.level)
    # a p-value of 0 means that no draw was as extreme: all the draws can say is p < 1/draws
    table["p_value_text"] = [("" if p != p else f"< {1 / n:.3g}" if p == 0 else f"{p:.4g}")
                             for p, n in zip(table["p_value"], table["draws"])]
    write_csv(out_csv, table)
    md = ["# Joint tests across the specification curve", "",
          f"{grid.draws} bootstrap draws under the null (seed {grid.seed}, resampling `{grid.resample}`): "
          f"{method_text(grid.joint_method)}.", ""]
    caution = shared_cluster_caution(grid, led["clustering"].astype(str))
    if caution and draw_files:
        md += [f"**Caution.** {caution}", ""]
    shown = table.drop(columns=["p_value"]).rename(columns={"p_value_text": "p_value"})
    md.append(tabulate(shown, headers="keys", tablefmt="github", showindex=False, floatfmt=".4g")
              if len(table) else "No joint tests were run.")
    write_text(out_md, "\n".join(md) + "\n")
    return table


def appendix(grid: Grid, ledger: str | Path, joint_csv: str | Path, out: str | Path,
             tables: Mapping[str, Mapping[str, str | Path]] | None = None) -> None:
    """appendix.tex, and the results tables (``tables``: ``{name: {ending: path}}``) it holds."""
    from .report import figure_names, render_appendix
    from .tables import grid_tables, latex_table, write_tables

    led = read_ledger(ledger)
    joint = pd.read_csv(joint_csv) if Path(joint_csv).stat().st_size > 1 else None
    built = grid_tables(grid, led)
    if tables is not None:
        write_tables(built, {name: {e: Path(p) for e, p in files.items()} for name, files in tables.items()})
    from .adoption import adoption_designs, baseline_names, latex_section

    paths = RunPaths.of_file(out)  # appendix.tex sits in the run folder; figures are named relative to it

    def figure(kind: str, outcome: str, focal: str) -> str:
        return str(paths.adoption_figure(kind, pair_slug(outcome, focal), "pdf").relative_to(paths.run))

    sections = [latex_section(led, outcome, focal, figure("event", outcome, focal),
                              figure("decomposition", outcome, focal), level=grid.level,
                              baseline=baseline_names(grid.raw), labels=grid.raw.get("labels") or {})
                for outcome, focal in adoption_designs(led)]
    render_appendix(grid, led, joint, figure_names(led), out, draws=grid.draws, seed=grid.seed,
                    resample=grid.resample, tables=[latex_table(t) for t in built.values()], sections=sections)


def compile_appendix(tex: str | Path, pdf: str | Path) -> None:
    from .report import compile_latex

    try:
        compile_latex(tex, pdf)
    except RuntimeError as exc:
        raise FegridError(f"The appendix {tex} did not compile: {exc}") from None


def grid_seeds(grid: Grid) -> dict[str, int | None]:
    """Every seed of the grid by config key: the joint tests' and each wild bootstrap's."""
    seeds: dict[str, int | None] = {"joint_inference.seed": grid.seed if grid.draws else None}
    for name, inference in sorted(grid.clustering.items()):
        if inference.bootstrap is not None:
            seeds[f"clustering.{name}.wild_bootstrap.seed"] = inference.bootstrap.seed
    return seeds


#: Environment variable holding the time (seconds since the epoch) at which the run started.
RUN_STARTED_ENV = "FEGRID_RUN_STARTED"


def provenance(grid: Grid, config: Mapping[str, Any], config_path: str, outputs: Mapping[str, str],
               benchmarks: Sequence[str], files: Mapping[str, str | Path], n_specs: int,
               snapshot: str | Path | None = None) -> None:
    """Write the provenance files (``files``: :meth:`RunPaths.provenance_files`, by name)."""
    from .provenance import build_manifest, write_provenance

    manifest = files["manifest"]
    started = os.environ.get(RUN_STARTED_ENV)
    man = build_manifest(config=config, data_path=grid.data_path, n_specs=n_specs, seeds=grid_seeds(grid),
                         outputs=outputs, benchmarks=benchmarks, workflow_root=SOURCE_CHECKOUT,
                         fitted_data_sha256=snapshot_sha256(snapshot) if snapshot is not None else None,
                         config_path=config_path, run_folder=Path(manifest).parent,
                         run_wall_seconds=time.time() - float(started) if started else None)
    write_provenance(man, files, config_path=config_path, draws=grid.draws, seed=grid.seed,
                     replication=grid.raw.get("replication", {}))
