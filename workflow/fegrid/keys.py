"""Content keys: every name fegrid derives from content is made here, and only here.

A key is a hash of canonical content (strings and bytes), so the same content always gets the same
key and any change to it gets a new one. This module is a leaf: it imports nothing of fegrid but the
version, and holds no state.

============== ===================================== ==================================================
key            what it hashes                        what gives a new key
============== ===================================== ==================================================
spec id        a specification's canonical content   what is estimated (not the choices' names or
               (12 hex); an estimator other than     their order in the config); least squares adds
               least squares adds its method and     nothing, so its ids predate the estimator
               instruments                           dimension
data file      the data file's bytes (SHA-256)       any byte of the file
snapshot       the data file's hash, the grid's      the file, a column added to or removed from the
               columns, how the file is read (CSV    grid, another CSV option or time frequency,
               options, time frequency), version     another fegrid version
settings       the engine's settings as JSON         tolerance, iterations, level, singletons, warning
                                                     thresholds, result fields, fegrid version
job            settings, snapshot and its            the data, the settings, or any of its
               specifications' canonical content     specifications
column         one column's values on given rows     any value (or missing value) in those rows
content        the column keys a specification reads any value a specification actually uses, after
                                                     its sample filter (not the rest of the file)
result         settings, spec content and its        the settings, the specification, or a value it
               content key                           uses: a one-row correction refits only the
                                                     specifications whose rows and columns hold it
design         settings that decide demeaning and    the absorbed effects' or weights' values on the
               the content of the effect, weight and design's rows (so also which rows it has),
               time columns on the design's rows     the tolerance, fegrid version
demeaned       design key, column name and column    the design, or the column's values on its rows
               key
joint draws    settings, snapshot, seed, resampling  the data, settings, any specification, the seed
               column, draws per job, every spec
config         the config as JSON with sorted keys   any setting (formatting and key order do not
                                                     count)
plan           config, data file, fegrid version     any of them
============== ===================================== ==================================================
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np
import pandas as pd

from . import __version__

__all__ = [
    "digest",
    "spec_id",
    "snapshot_key",
    "settings_digest",
    "job_key",
    "column_key",
    "content_key",
    "result_key",
    "design_key",
    "demeaned_key",
    "joint_key",
    "config_digest",
    "plan_key",
    "ENGINE_VERSION",
]

#: Part of every key of a fitted number: results of another fegrid version are never reused.
ENGINE_VERSION = __version__


def digest(*parts: str | bytes) -> str:
    """SHA-256 (hex) of the parts, each followed by a separator byte so that parts cannot run together.

    >>> digest("a", "b") != digest("ab")
    True
    """
    h = hashlib.sha256()
    for part in parts:
        h.update(part if isinstance(part, bytes) else part.encode())
        h.update(b"\x00")
    return h.hexdigest()


def spec_id(canonical: str) -> str:
    """The 12-hex id of a specification from its canonical JSON."""
    return hashlib.sha256(canonical.encode()).hexdigest()[:12]


def snapshot_key(data_sha256: str, columns: Iterable[str], reading: Mapping[str, Any] | None = None) -> str:
    """``<data hash>-<columns and reading hash>``: a new column, or another way of reading the file
    (CSV separator, decimal mark, encoding, the time column's frequency), gives a new snapshot."""
    body = json.dumps({"columns": sorted(columns), "reading": dict(reading or {}), "fegrid": ENGINE_VERSION},
                      sort_keys=True)
    return f"{data_sha256[:16]}-{hashlib.sha256(body.encode()).hexdigest()[:8]}"


def settings_digest(settings_json: str, snapshot: str) -> str:
    """The salt shared by the jobs and draws of one grid on one snapshot."""
    return hashlib.sha256((snapshot + settings_json).encode()).hexdigest()


def job_key(salt: str, canonicals: Iterable[str]) -> str:
    """16-hex key of a fit job from the grid's salt and its specifications' canonical content."""
    h = hashlib.sha256(salt.encode())
    for canonical in canonicals:
        h.update(canonical.encode())
    return h.hexdigest()[:16]


def column_key(values: pd.Series | np.ndarray) -> str:
    """Key of one column's values on given rows (order, missing values and dtype kind count)."""
    series = values if isinstance(values, pd.Series) else pd.Series(values)
    hashed = pd.util.hash_pandas_object(series, index=False).to_numpy()
    return digest(series.dtype.kind, str(len(series)), hashed.tobytes())


def content_key(columns: Mapping[str, str]) -> str:
    """Key of the data a specification reads: its columns' keys, by column name."""
    return digest(json.dumps(dict(sorted(columns.items()))))


def result_key(settings_json: str, canonical: str, content: str) -> str:
    """24-hex key of one specification's stored results."""
    return digest(ENGINE_VERSION, settings_json, canonical, content)[:24]


def design_key(demean_settings: str, n_rows: int, columns: Mapping[str, str]) -> str:
    """Key of a design: the demeaning settings, its number of rows, and the keys of the columns that
    define its projections (effects, trends' time, weights) on its rows."""
    return digest(demean_settings, str(n_rows), json.dumps(dict(sorted(columns.items()))))


def demeaned_key(design: str, column: str, values: str) -> str:
    """Key of one demeaned column of a design."""
    return digest(design, column, values)


def joint_key(salt: str, settings: Any, canonicals: Iterable[str]) -> str:
    """16-hex key of a grid's bootstrap draws."""
    h = hashlib.sha256((salt + json.dumps(settings)).encode())
    for canonical in sorted(canonicals):
        h.update(canonical.encode())
    return h.hexdigest()[:16]


def plan_key(config: Mapping[str, Any], data_sha256: str) -> str:
    """16-hex key of a resolved plan: the config (defaults filled in), the data file, the version."""
    return digest(ENGINE_VERSION, config_digest(config), data_sha256)[:16]


def config_digest(config: Mapping[str, Any]) -> str:
    """SHA-256 of the config as JSON with sorted keys (key order and YAML formatting do not count)."""
    return hashlib.sha256(json.dumps(config, sort_keys=True, default=str).encode()).hexdigest()
