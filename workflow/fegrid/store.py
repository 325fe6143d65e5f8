"""Files on disk: atomic writes, the run's folder layout and the store of demeaned columns.

Every file fegrid writes goes to a temporary name in the same folder and is renamed into place when
complete, so a run killed at any moment never leaves a half-written file under a final name.
"""

from __future__ import annotations

import io
import json
import os
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
    "write_json",
    "RunPaths",
    "FileDemeanStore",
    "FileResultStore",
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


def write_parquet(path: str | Path, frame: pd.DataFrame) -> Path:
    return atomic_write(path, lambda fh: frame.to_parquet(fh, index=False))


def pair_slug(outcome: str, focal: str) -> str:
    """File-name-safe name of an outcome x focal pair.

    >>> pair_slug("log yield", "irrigation/ha")
    'log_yield--irrigation_ha'
    """
    keep = lambda s: "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in s)  # noqa: E731
    return f"{keep(outcome)}--{keep(focal)}"


@dataclass(frozen=True)
class RunPaths:
    """Where one run's files live: ``<root>/<run_name>/``."""

    root: Path
    run_name: str

    @property
    def run(self) -> Path:
        return Path(self.root) / self.run_name

    @property
    def cache(self) -> Path:
        return self.run / "cache"

    def snapshot(self, key: str) -> Path:
        return self.cache / "data" / f"{key}.parquet"

    def fit(self, job_key: str) -> Path:
        return self.cache / "fits" / f"{job_key}.parquet"

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
    def timings(self) -> Path:
        return self.run / "timings.csv"

    def figure(self, slug: str, ext: str) -> Path:
        return self.run / "figures" / f"curve-{slug}.{ext}"

    def joint_draws(self, key: str, chunk: int) -> Path:
        return self.cache / "joint" / key / f"draws-{chunk:04d}.parquet"

    def file(self, name: str) -> Path:
        """A report file directly in the run folder (summary.csv, appendix.tex, manifest.json...)."""
        return self.run / name

    def benchmark(self, rule: str, name: str) -> Path:
        return self.run / "benchmarks" / rule / f"{name}.tsv"


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
