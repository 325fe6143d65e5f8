"""Files on disk: atomic writes, the run's folder layout and the store of demeaned columns.

Every file fegrid writes goes to a temporary name in the same folder and is renamed into place when
complete, so a run killed at any moment never leaves a half-written file under a final name.
"""

from __future__ import annotations

import io
import json
import os
import shutil
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = [
    "atomic_write",
    "write_text",
    "write_csv",
    "write_parquet",
    "read_fegrid_metadata",
    "write_json",
    "RunPaths",
    "REPORTS_ROOT",
    "FileDemeanStore",
    "FileResultStore",
    "PublishedOutputs",
    "PRIVATE_ENTRIES",
    "pair_slug",
]


def atomic_write(path: str | Path, writer: Callable[[io.BufferedWriter], None], *,
                 durable: bool = True) -> Path:
    """Call ``writer`` on a temporary file beside ``path``, then rename it to ``path``.

    ``durable`` also flushes the file to disk before the rename (survives a power cut, not only a
    killed process); small per-specification files skip it for speed.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            writer(fh)
            if durable:
                fh.flush()
                os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def write_text(path: str | Path, text: str) -> Path:
    return atomic_write(path, lambda fh: fh.write(text.encode()))


def write_json(path: str | Path, obj: object) -> Path:
    return write_text(path, json.dumps(obj, indent=2, sort_keys=True, default=str) + "\n")


def write_csv(path: str | Path, frame: pd.DataFrame) -> Path:
    return write_text(path, frame.to_csv(index=False, lineterminator="\n"))


def write_parquet(path: str | Path, frame: pd.DataFrame, *, fegrid_metadata: dict | None = None) -> Path:
    """Write ``frame`` as Parquet; ``fegrid_metadata`` (JSON-ready) goes into the file's schema
    metadata under the key ``fegrid`` (see :func:`read_fegrid_metadata`)."""
    if fegrid_metadata is None:
        return atomic_write(path, lambda fh: frame.to_parquet(fh, index=False))
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.Table.from_pandas(frame, preserve_index=False)
    meta = dict(table.schema.metadata or {})
    meta[b"fegrid"] = json.dumps(fegrid_metadata, sort_keys=True).encode()
    table = table.replace_schema_metadata(meta)
    return atomic_write(path, lambda fh: pq.write_table(table, fh))


def read_fegrid_metadata(path: str | Path) -> dict:
    """The ``fegrid`` schema metadata of a Parquet file written by :func:`write_parquet` (or {})."""
    import pyarrow.parquet as pq

    meta = pq.read_schema(path).metadata or {}
    return json.loads(meta[b"fegrid"]) if b"fegrid" in meta else {}


def pair_slug(outcome: str, focal: str, curve: str = "least_squares") -> str:
    """File-name-safe name of a curve: outcome, focal regressor and (unless least squares) curve.

    >>> pair_slug("log yield", "irrigation/ha"), pair_slug("y", "x", "poisson_pml")
    ('log_yield--irrigation_ha', 'y--x--poisson_pml')
    """
    keep = lambda s: "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in s)  # noqa: E731
    slug = f"{keep(outcome)}--{keep(focal)}"
    return slug if curve == "least_squares" else f"{slug}--{keep(curve)}"


#: The folder, under the working directory, that holds one folder per run (``reports/<run_name>/``).
REPORTS_ROOT = "reports"


@dataclass(frozen=True)
class RunPaths:
    """Where one run's files live: ``<root>/<run_name>/``."""

    root: Path
    run_name: str

    @staticmethod
    def of_file(path: str | Path, depth: int = 1) -> RunPaths:
        """The run whose folder holds ``path`` ``depth`` levels down (the ledger: 1; a fit file: 3)."""
        run = Path(path).parents[depth - 1]
        return RunPaths(run.parent, run.name)

    @property
    def run(self) -> Path:
        return Path(self.root) / self.run_name

    @property
    def lock(self) -> Path:
        """The run folder's lock file (see :mod:`fegrid.lock`)."""
        return self.run / ".lock"

    @property
    def previous(self) -> Path:
        """Where ``fegrid run`` keeps the previous run's outputs until the new run succeeds."""
        return self.run / ".previous"

    @property
    def snakemake_log(self) -> Path:
        """What Snakemake printed during the last ``fegrid run`` whose terminal showed fegrid's progress lines
        instead (the failure's explanation is read from it)."""
        return self.run / "logs" / "snakemake.log"

    @property
    def put_back(self) -> Path:
        """Marks a run folder whose published files a failed ``fegrid run`` put back: Snakemake's records may
        describe the failed run's files, so the next run rebuilds the reports."""
        return self.cache / "put-back"

    @property
    def cache(self) -> Path:
        return self.run / "cache"

    def snapshot(self, key: str) -> Path:
        return self.cache / "data" / f"{key}.parquet"

    def fit(self, job_key: str) -> Path:
        return self.cache / "fits" / f"{job_key}.parquet"

    def plan_file(self, key: str) -> Path:
        """A resolved plan, kept so that every job of a run reads it instead of expanding the grid."""
        return self.cache / "plans" / f"{key}.pkl"

    def job_specs(self, job_key: str) -> Path:
        """The specifications of one fit job, written when the run is planned."""
        return self.cache / "jobs" / f"{job_key}.pkl"

    def work_log(self, job_key: str) -> Path:
        return self.cache / "fits" / f"{job_key}.json"

    @property
    def demeaned(self) -> Path:
        return self.cache / "demeaned"

    @property
    def results(self) -> Path:
        return self.cache / "results"

    @property
    def ledger_csv(self) -> Path:
        return self.run / "ledger.csv"

    @property
    def ledger_parquet(self) -> Path:
        return self.run / "ledger.parquet"

    @property
    def coefficients_parquet(self) -> Path:
        """Every kept coefficient of every specification, with its covariance row."""
        return self.run / "coefficients.parquet"

    @property
    def coefficients_csv(self) -> Path:
        return self.run / "coefficients.csv"

    @property
    def timings(self) -> Path:
        return self.run / "timings.csv"

    @property
    def manifest(self) -> Path:
        return self.run / "manifest.json"

    @property
    def replication(self) -> Path:
        return self.run / "REPLICATION.md"

    @property
    def environment_lock(self) -> Path:
        """Every Python distribution of the environment that ran the grid, pinned (``name==version``)."""
        return self.run / "environment-lock.txt"

    @property
    def container(self) -> Path:
        """A container recipe pinned to :attr:`environment_lock`."""
        return self.run / "Dockerfile"

    def provenance_files(self) -> dict[str, Path]:
        """The files the provenance step writes, by name."""
        return {"manifest": self.manifest, "replication": self.replication,
                "environment_lock": self.environment_lock, "container": self.container}

    def table(self, name: str, ending: str) -> Path:
        """A results table (``tables.<name>`` in the config) in one format: tex, md or html."""
        return self.run / "tables" / f"{name}.{ending}"

    def figure(self, slug: str, ext: str) -> Path:
        return self.run / "figures" / f"curve-{slug}.{ext}"

    @staticmethod
    def figure_slug(path: str | Path) -> str:
        """The pair's slug of a curve figure written at :meth:`figure`."""
        return Path(path).stem.removeprefix("curve-")

    def adoption_figure(self, kind: str, slug: str, ext: str) -> Path:
        """A staggered design's figure: ``kind`` is ``event`` (the event study) or ``decomposition``."""
        assert kind in ("event", "decomposition"), kind
        return self.run / "figures" / f"{kind}-{slug}.{ext}"

    def joint_draws(self, key: str, chunk: int | str) -> Path:
        """One chunk of bootstrap draws (``chunk`` may be a wildcard such as ``"{chunk}"``)."""
        name = f"{chunk:04d}" if isinstance(chunk, int) else chunk
        return self.cache / "joint" / key / f"draws-{name}.parquet"

    def log(self, stage: str, name: str = "") -> Path:
        """The log of one job of a stage: ``logs/<stage>.log`` or ``logs/<stage>/<name>.log``."""
        return self.run / "logs" / (f"{stage}/{name}.log" if name else f"{stage}.log")

    def file(self, name: str) -> Path:
        """A report file directly in the run folder (summary.csv, appendix.tex, manifest.json...)."""
        return self.run / name

    def benchmark(self, stage: str, name: str = "all") -> Path:
        """Wall time and memory of one job of a stage, as Snakemake's benchmark writes them."""
        return self.run / "benchmarks" / stage / f"{name}.tsv"


class FileDemeanStore:
    """Demeaned columns kept as ``.npy`` files named by the hash of their content's recipe.

    A key already hashes the data, the sample's rows, the absorbed effects, the weights, the
    tolerance and the column, so a file found under it is the right one; writes are atomic, so a
    file that exists is complete. Two parallel jobs that compute the same column both write the
    same bytes, and the later rename wins harmlessly.
    """

    def __init__(self, folder: str | Path) -> None:
        self.folder = Path(folder)
        self.hits = 0
        self.writes = 0

    def _path(self, key: str) -> Path:
        return self.folder / key[:2] / f"{key}.npy"

    def get(self, key: str) -> tuple[np.ndarray, int, bool] | None:
        path = self._path(key)
        meta = path.with_suffix(".json")
        if not path.is_file() or not meta.is_file():
            return None
        info = json.loads(meta.read_text())
        self.hits += 1
        return np.load(path), int(info["iterations"]), bool(info["converged"])

    def put(self, key: str, values: np.ndarray, iterations: int, converged: bool) -> None:
        path = self._path(key)
        atomic_write(path, lambda fh: np.save(fh, values))
        # the metadata is written last: get() reads a column only once both files exist
        write_json(path.with_suffix(".json"), {"iterations": iterations, "converged": converged})
        self.writes += 1


class FileResultStore:
    """One specification's results, kept as a small JSON file named by the hash of everything that
    determines them (data, settings, the specification's canonical content).

    Jobs look here before fitting, so a job whose other specifications changed (a clustering or a
    control set was added) fits only the new ones. JSON keeps floats exactly (shortest repr).
    """

    def __init__(self, folder: str | Path) -> None:
        self.folder = Path(folder)

    def path(self, key: str) -> Path:
        return self.folder / key[:2] / f"{key}.json"

    def has(self, key: str) -> bool:
        return self.path(key).is_file()

    def get(self, key: str) -> dict | None:
        path = self.path(key)
        return json.loads(path.read_text()) if path.is_file() else None

    def put(self, key: str, record: dict) -> None:
        text = json.dumps(record, sort_keys=True)
        atomic_write(self.path(key), lambda fh: fh.write(text.encode()), durable=False)


#: Entries of a run folder that are the run's working state, not its published outputs.
PRIVATE_ENTRIES = frozenset({"cache", "logs", "benchmarks", "rounds", ".previous", ".lock", ".snakemake"})


class PublishedOutputs:
    """The files a run publishes in its folder (everything but :data:`PRIVATE_ENTRIES`).

    While a new run works, the previous run's files are kept aside as hard links (a copy where the
    file system has none) in ``<run>/.previous/``: Snakemake deletes a job's old outputs before it
    runs the job, so a run that fails late would otherwise leave a mix of new files, old files and
    gaps. On failure the previous set is put back whole; on success it is dropped.
    """

    def __init__(self, paths: RunPaths) -> None:
        self.run = paths.run
        self.previous = paths.previous

    def current(self) -> list[Path]:
        """Published files, relative to the run folder (temporary ``.part`` files left out)."""
        if not self.run.is_dir():
            return []
        out = []
        for entry in sorted(self.run.iterdir()):
            if entry.name in PRIVATE_ENTRIES:
                continue
            files = [entry] if entry.is_file() else sorted(p for p in entry.rglob("*") if p.is_file())
            out += [f.relative_to(self.run) for f in files if not f.name.endswith(".part")]
        return out

    def keep_previous(self) -> int:
        self.drop_previous()
        kept = self.current()
        for rel in kept:
            target = self.previous / rel
            target.parent.mkdir(parents=True, exist_ok=True)
            try:
                os.link(self.run / rel, target)
            except OSError:
                shutil.copy2(self.run / rel, target)
        return len(kept)

    def restore_previous(self) -> int:
        """Put the previous set back whole (removing files it did not have); 0 when there was none."""
        if not self.previous.is_dir():
            return 0
        kept = sorted(p.relative_to(self.previous) for p in self.previous.rglob("*") if p.is_file())
        if kept:
            for rel in set(self.current()) - set(kept):
                (self.run / rel).unlink()
            for rel in kept:
                (self.run / rel).parent.mkdir(parents=True, exist_ok=True)
                os.replace(self.previous / rel, self.run / rel)
        self.drop_previous()
        return len(kept)

    def drop_previous(self) -> None:
        if self.previous.exists():
            shutil.rmtree(self.previous)

    def prune_undeclared(self, declared: dict[str, Path]) -> list[str]:
        """Remove figures the grid no longer declares (an outcome or focal regressor left it)."""
        wanted = {Path(p).resolve() for p in declared.values()}
        stale = [rel for rel in self.current()
                 if rel.parts[0] == "figures" and (self.run / rel).resolve() not in wanted]
        for rel in stale:
            (self.run / rel).unlink()
        return [str(rel) for rel in stale]
