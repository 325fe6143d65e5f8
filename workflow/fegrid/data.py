"""Reading the panel data and checking that it can serve the grid."""

from __future__ import annotations

import hashlib
import io
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .errors import DataError
from .grid import Grid
from .samples import Panel, apply_sample
from .staggered import check_absorbing, shown

__all__ = ["READERS", "CsvOptions", "file_sha256", "file_columns", "read_table", "check_columns", "check_data",
           "levels_for", "require_file"]


@dataclass(frozen=True)
class CsvOptions:
    """How a CSV file is written (``data.csv`` in the config)."""

    separator: str = ","
    decimal: str = "."
    encoding: str = "utf-8"

    def kwargs(self) -> dict[str, str]:
        return {"sep": self.separator, "decimal": self.decimal, "encoding": self.encoding}


@dataclass(frozen=True)
class _Format:
    """One file format: the names of its columns, and a reader of only the columns asked for."""

    name: str
    endings: tuple[str, ...]
    header: Callable[[Any, CsvOptions], list[str]]
    read: Callable[[Any, list[str] | None, CsvOptions], pd.DataFrame]


def _compression(source: Any) -> str | None:
    name = str(getattr(source, "name", source))
    return "gzip" if name.lower().endswith(".gz") else None


def _csv_header(source: Any, csv: CsvOptions) -> list[str]:
    return list(pd.read_csv(source, nrows=0, compression=_compression(source), **csv.kwargs()).columns)


def _csv_read(source: Any, columns: list[str] | None, csv: CsvOptions) -> pd.DataFrame:
    return pd.read_csv(source, usecols=columns, compression=_compression(source), **csv.kwargs())


def _parquet_header(source: Any, csv: CsvOptions) -> list[str]:
    import pyarrow.parquet as pq

    return list(pq.read_schema(source).names)


def _parquet_read(source: Any, columns: list[str] | None, csv: CsvOptions) -> pd.DataFrame:
    return pd.read_parquet(source, columns=columns)


def _feather_header(source: Any, csv: CsvOptions) -> list[str]:
    import pyarrow.ipc

    return list(pyarrow.ipc.open_file(source).schema.names)


def _feather_read(source: Any, columns: list[str] | None, csv: CsvOptions) -> pd.DataFrame:
    import pyarrow.feather

    return pyarrow.feather.read_table(source, columns=columns).to_pandas()


def _dta_header(source: Any, csv: CsvOptions) -> list[str]:
    with pd.read_stata(source, iterator=True, convert_categoricals=False) as reader:
        return list(reader.variable_labels())


def _dta_read(source: Any, columns: list[str] | None, csv: CsvOptions) -> pd.DataFrame:
    return pd.read_stata(source, columns=columns, convert_categoricals=False)


_FORMATS = (
    _Format("CSV", (".csv", ".csv.gz"), _csv_header, _csv_read),
    _Format("Parquet", (".parquet", ".pq"), _parquet_header, _parquet_read),
    _Format("Feather (Arrow IPC)", (".feather", ".arrow"), _feather_header, _feather_read),
    _Format("Stata", (".dta",), _dta_header, _dta_read),
)

#: File ending -> format. Each format reads only the columns the grid uses.
READERS: dict[str, _Format] = {ending: f for f in _FORMATS for ending in f.endings}


def _format_of(path: Path) -> _Format:
    name = path.name.lower()
    for ending in sorted(READERS, key=len, reverse=True):
        if name.endswith(ending):
            return READERS[ending]
    raise DataError(f"The data file '{path}' has an unknown ending '{path.suffix}'; fegrid reads "
                    f"{', '.join(READERS)}.")


def file_sha256(path: str | Path) -> str:
    """SHA-256 of a file's bytes (its content, whatever its time stamp)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def require_file(path: Path) -> None:
    """Raise a :class:`DataError` unless ``path`` is an existing file (a folder is named as such)."""
    if path.is_dir():
        raise DataError(f"The data path '{path}' (data.path in the config) is a folder; name the data file in it.")
    if not path.is_file():
        raise DataError(f"The data file '{path}' (data.path in the config) does not exist.")


def _separator_hint(path: Path, header: list[str]) -> None:
    """A CSV read as one column whose name holds a semicolon or a tab was written with that separator."""
    if len(header) == 1:
        for sep, name in ((";", "semicolons"), ("\t", "tabs")):
            if sep in str(header[0]):
                raise DataError(
                    f"The data file '{path}' reads as a single column '{str(header[0])[:60]}': its values seem "
                    f"separated by {name}, not commas. Save it as a comma-separated CSV (or as Parquet)."
                )


def file_columns(path: str | Path, *, csv: CsvOptions | None = None) -> list[str]:
    """The names of a data file's columns, from its header alone (nothing else is read)."""
    path = Path(path)
    fmt = _format_of(path)
    require_file(path)
    try:
        header = fmt.header(path, csv or CsvOptions())
    except Exception as exc:  # any parser's failure is the user's file, not our bug
        raise DataError(f"The data file '{path}' cannot be read as {fmt.name}: {exc}") from None
    if fmt.name == "CSV":
        _separator_hint(path, header)
    return header


def read_table(path: str | Path, columns: Iterable[str] | None = None, *, content: bytes | None = None,
               csv: CsvOptions | None = None) -> pd.DataFrame:
    """Read a CSV (or .csv.gz), Parquet, Feather or .dta file; with ``columns``, only those of them
    that exist, and only those are read from the file.

    Columns the file lacks are left for :func:`check_data` to name together with their role. With
    ``content``, the file's bytes already read are parsed (``path`` then only names the format), so
    that what is hashed and what is parsed are the same bytes.
    """
    path = Path(path)
    fmt = _format_of(path)
    csv = csv or CsvOptions()
    if content is None:
        require_file(path)

    def source() -> Any:
        if content is None:
            return path
        buffer = io.BytesIO(content)
        buffer.name = path.name  # the ending tells the CSV reader about gzip
        return buffer

    wanted = list(dict.fromkeys(columns)) if columns is not None else None
    try:
        header = fmt.header(source(), csv)
        if fmt.name == "CSV":
            _separator_hint(path, header)
        frame = fmt.read(source(), [c for c in wanted if c in set(header)] if wanted is not None else None, csv)
    except DataError:
        raise
    except Exception as exc:  # any parser's failure is the user's file, not our bug
        raise DataError(f"The data file '{path}' cannot be read as {fmt.name}: {exc}") from None
    if wanted is not None:
        frame = frame[[c for c in wanted if c in frame.columns]]
    frame.attrs["file_columns"] = header  # for error messages: the whole file, not what was read
    return frame


def levels_for(frame: pd.DataFrame, grid: Grid) -> dict[str, list]:
    """Sorted levels of the columns the grid expansion needs (``drop_each`` generators)."""
    out = {}
    for col in grid.level_columns():
        if col not in frame.columns:
            raise DataError(
                f"The sample filter column '{col}' (drop_each) named in the config is not in the "
                f"data. Its columns are: {', '.join(map(str, frame.columns))}."
            )
        values = frame[col].dropna().unique()
        out[col] = sorted(values.tolist(), key=lambda v: (str(type(v)), v))
    return out


def check_columns(file_columns: Sequence[object], grid: Grid, *, path: str = "the data",
                  present: set[object] | None = None) -> None:
    """Raise a :class:`DataError` naming the role and column when a column the grid uses is not in
    the file (``file_columns``: its header; ``present``: the columns read, by default all of them)."""
    present = set(file_columns) if present is None else present
    for role, cols in grid.roles().items():
        missing = [c for c in cols if c not in present]
        if missing:
            raise DataError(
                f"The {role} column(s) {', '.join(repr(m) for m in missing)} named in the config "
                f"are not in {path}. Its columns are: {', '.join(map(str, file_columns))}."
            )


def check_data(frame: pd.DataFrame, grid: Grid, *, path: str = "the data") -> None:
    """Raise a :class:`DataError` naming the column at fault when the data cannot serve the grid.

    Checks: every column exists; outcomes, regressors, controls, weights and time are numeric;
    (unit, time) pairs are unique; unit, time and cluster variables have no missing values;
    weights are positive; every sample keeps some rows.
    """
    roles = grid.roles()
    if len(frame) == 0:
        raise DataError(f"{path[0].upper() + path[1:]} has a header but no rows of data.")
    check_columns(frame.attrs.get("file_columns", list(frame.columns)), grid, path=path,
                  present=set(frame.columns))
    numeric_roles = ("outcome", "focal regressor", "control", "weights", "time")
    for role in numeric_roles:
        for col in roles[role]:
            if not pd.api.types.is_numeric_dtype(frame[col]) or pd.api.types.is_bool_dtype(frame[col]):
                example = frame[col].dropna().astype(str).head(3).tolist()
                raise DataError(
                    f"The {role} column '{col}' is not numeric (values such as {example}); recode it "
                    "as numbers before fitting."
                )
    for role in numeric_roles:
        for col in roles[role]:
            values = frame[col].to_numpy(dtype=float)
            infinite = np.isinf(values)
            if infinite.any():
                rows = np.flatnonzero(infinite)[:3] + 2  # file lines: a header line, then rows from 1
                raise DataError(
                    f"The {role} column '{col}' has {int(infinite.sum())} infinite value(s) (inf or -inf), "
                    f"e.g. on line(s) {', '.join(map(str, rows))} of {path}; a regression cannot use them. "
                    "Set them to missing (the rows are then dropped per specification) or fix them."
                )
    for role in ("unit", "time", "cluster", "resampling"):
        for col in roles[role]:
            n_missing = int(frame[col].isna().sum())
            if n_missing:
                raise DataError(
                    f"The {role} column '{col}' has {n_missing} missing value(s); every observation "
                    "needs a value there. Drop those rows or fill them before fitting."
                )
    if grid.panel.time:
        keys = [grid.panel.unit, grid.panel.time]
        dup = frame.duplicated(keys, keep=False)
        if dup.any():
            first = frame.loc[dup, keys].iloc[0].tolist()
            raise DataError(
                f"The panel keys ({grid.panel.unit}, {grid.panel.time}) are not unique: "
                f"{int(dup.sum())} rows share a key, e.g. {grid.panel.unit}={first[0]}, "
                f"{grid.panel.time}={first[1]}. Each unit may appear once per period."
            )
    if grid.panel.treatment and grid.panel.time:
        _check_adoption(frame, grid.panel)
    for col in roles["weights"]:
        w = frame[col].to_numpy(dtype=float)
        bad = np.isfinite(w) & (w <= 0)
        if bad.any():
            raise DataError(f"The weights column '{col}' has {int(bad.sum())} value(s) that are not positive.")
    # every sample keeps some rows: its filters read their own columns and the panel's keys only, so a
    # frame of those is filtered (not ten copies of every column)
    keys = [grid.panel.unit, *([grid.panel.time] if grid.panel.time else []), *roles["sample filter"]]
    slim = frame[list(dict.fromkeys(keys))]
    for _, sample in grid.sample_defs(levels_for(frame, grid)).values():
        apply_sample(slim, sample, grid.panel)


def _check_adoption(frame: pd.DataFrame, panel: Panel) -> None:
    """A staggered adoption: the treatment is 0/1 and stays on; the adoption period, when declared, is one
    value per unit and agrees with the treatment (treated exactly from the adoption period on)."""
    assert panel.treatment and panel.time
    check_absorbing(frame, panel.unit, panel.time, panel.treatment)
    if not panel.adoption:
        return
    col = panel.adoption
    if not pd.api.types.is_numeric_dtype(frame[col]):
        raise DataError(f"data.adoption: the column '{col}' must hold periods of the time column "
                        f"'{panel.time}' as numbers (empty for never treated).")
    spread = frame.groupby(panel.unit)[col].nunique(dropna=False)
    if (spread > 1).any():
        raise DataError(f"data.adoption: the column '{col}' takes several values for unit {shown(spread.idxmax())}; "
                        "a unit adopts once.")
    expected = (frame[panel.time] >= frame[col]).astype(float)
    observed = frame[panel.treatment]
    bad = observed.notna() & (expected != observed)
    if bad.any():
        row = frame.loc[bad].iloc[0]
        raise DataError(f"data.adoption: unit {shown(row[panel.unit])} has '{panel.treatment}' = "
                        f"{shown(row[panel.treatment])} in period {shown(row[panel.time])} but adopts in "
                        f"{shown(row[col])} ('{col}'); the treatment must "
                        f"be 1 exactly from the adoption period on ({int(bad.sum())} disagreeing row(s)).")

