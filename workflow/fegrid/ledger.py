"""The ledger's contract: its columns and their types, the status values, the grid's dimensions,
and the one reader that restores the types from either file.

Every module that reads or writes a ledger imports these names; none restates them.
"""

from __future__ import annotations

import typing
from dataclasses import fields
from pathlib import Path

import pandas as pd

from .errors import FegridError
from .estimate import RESULT_COLUMNS, STATUS_FAILED, STATUS_NOT_IDENTIFIED, STATUS_OK, SpecResult

__all__ = [
    "DIMENSIONS",
    "PAIR",
    "DEFAULT_CURVE",
    "STATUS_OK",
    "STATUS_NOT_IDENTIFIED",
    "STATUS_FAILED",
    "STATUSES",
    "LEDGER_COLUMNS",
    "LEDGER_DTYPES",
    "read_ledger",
    "sample_family",
]

#: The grid's dimensions, in the order the ledger shows them.
DIMENSIONS: tuple[str, ...] = ("outcome", "focal", "absorb", "clustering", "sample", "controls", "weights",
                               "estimator")

#: A specification curve is drawn, summarised and tested for each outcome x focal regressor x curve:
#: estimates of different methods (a least-squares slope, a 2SLS coefficient, a Poisson
#: semi-elasticity) are not comparable, so each method has its own curve unless choices share a name.
PAIR: list[str] = ["outcome", "focal", "curve"]

#: The curve of least-squares estimates: its files keep the names they had before the estimator dimension.
DEFAULT_CURVE = "least_squares"

def sample_family(sample: str) -> str:
    """The family of a generated sample: ``drop_each`` names its samples ``<name>:<level>``.

    >>> sample_family("leave_one_valley_out:V01"), sample_family("all")
    ('leave_one_valley_out', 'all')
    """
    return sample.split(":", 1)[0]


#: Every status a ledger row can have.
STATUSES: tuple[str, ...] = (STATUS_OK, STATUS_NOT_IDENTIFIED, STATUS_FAILED)

_FRONT = ["spec_id", *DIMENSIONS, "curve", "estimate", "std_error", "t_stat", "p_value", "ci_low", "ci_high",
          "df_inference", "n_obs", "n_clusters", "n_singletons", "within_r2", "status", "message",
          "is_baseline"]

#: Ledger columns, in order: identity and choices, the estimate, then the engine's diagnostics.
LEDGER_COLUMNS: tuple[str, ...] = tuple(_FRONT + [c for c in RESULT_COLUMNS if c not in _FRONT])

_KIND = {"str": "string", "float": "float64", "int": "int64", "bool": "bool"}
_HINTS = typing.get_type_hints(SpecResult)

#: The type of every ledger column (``string`` columns hold "" rather than a missing value).
LEDGER_DTYPES: dict[str, str] = {
    **{c: "string" for c in ("spec_id", *DIMENSIONS, "curve")},
    "is_baseline": "bool",
    **{f.name: _KIND[_HINTS[f.name].__name__] for f in fields(SpecResult)},
}


def read_ledger(path: str | Path) -> pd.DataFrame:
    """Read a ledger from ``ledger.parquet`` or ``ledger.csv`` with every column's type restored.

    Empty text in a CSV reads as "", empty numbers as NaN, ``True``/``False`` as booleans, so the
    two files give the same frame.
    """
    path = Path(path)
    try:
        if path.suffix == ".parquet":
            frame = pd.read_parquet(path)
        else:
            frame = pd.read_csv(path, dtype=str, keep_default_na=False)
    except Exception as exc:  # a user's file
        raise FegridError(f"The ledger '{path}' cannot be read: {exc}") from None
    missing = [c for c in ("spec_id", "estimate", "std_error", "p_value", "status", "is_baseline")
               if c not in frame.columns]
    if missing:
        raise FegridError(f"'{path}' is not a fegrid ledger: it lacks the column(s) {', '.join(missing)}.")
    if "estimator" not in frame.columns:  # a ledger written before the estimator dimension: least squares
        frame["estimator"] = DEFAULT_CURVE
    if "curve" not in frame.columns:
        frame["curve"] = DEFAULT_CURVE
    for col in frame.columns:
        kind = LEDGER_DTYPES.get(col)
        if kind is None:
            continue
        values = frame[col]
        if kind == "string":
            frame[col] = values.fillna("").astype(str)
        elif kind == "bool":
            frame[col] = values.astype(str).isin(["True", "true", "1"])
        elif kind == "int64":
            frame[col] = pd.to_numeric(values.replace("", None)).fillna(0).astype("int64")
        else:
            frame[col] = pd.to_numeric(values.replace("", None), errors="coerce").astype("float64")
    return frame
