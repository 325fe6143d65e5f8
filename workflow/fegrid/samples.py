"""Samples: declarative row filters, applied in a fixed order. Nothing is evaluated as code.

The registry :data:`SAMPLE_FILTERS` maps each filter key of the config to a function
``(frame, argument, panel) -> boolean mask``. Filters apply in the registry's order, each to the rows
the previous ones kept, so that ``balanced`` means balanced *within* the filtered sample.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .errors import ConfigError, DataError

__all__ = ["SampleDef", "SampleFilter", "Panel", "SAMPLE_FILTERS", "apply_sample", "parse_sample"]


@dataclass(frozen=True)
class Panel:
    """The panel's key columns."""

    unit: str
    time: str | None = None
    #: the time column's declared frequency (its dates are numbered as periods), or None
    frequency: str | None = None
    #: a staggered adoption: the 0/1 treatment column and, optionally, the adoption-period column
    treatment: str | None = None
    adoption: str | None = None

    def bound(self, column: str, value: Any) -> float:
        """A range bound on ``column``: a date or period label on a dated time column becomes its number."""
        if not isinstance(value, str):
            return value
        if column == self.time and self.frequency is not None:
            from .periods import period_number

            return float(period_number(value, self.frequency))
        raise ConfigError(f"A sample's range on column '{column}' has the bound '{value}', which is not a number; "
                          "dates are allowed only on the time column when data.time_frequency is set.")


@dataclass(frozen=True)
class SampleDef:
    """A named sample: filter key -> argument, in canonical (JSON-ready, sorted) form."""

    name: str
    filters: tuple[tuple[str, Any], ...] = ()

    def canonical(self) -> dict[str, Any]:
        return {k: v for k, v in self.filters}

    def columns(self) -> set[str]:
        """The data columns the filters read (the panel's keys aside)."""
        return {c for key, arg in self.filters for c in SAMPLE_FILTERS[key].columns(arg)}


def _level_match(series: pd.Series, levels: list[Any], *, sample: str, key: str) -> np.ndarray:
    if pd.api.types.is_numeric_dtype(series) and not pd.api.types.is_bool_dtype(series):
        try:
            wanted = [float(v) for v in levels]
        except (TypeError, ValueError):
            raise DataError(
                f"Sample '{sample}' filters column '{series.name}' ({key}) with levels {levels}, "
                "but the column is numeric."
            ) from None
        values = series.to_numpy(dtype=float)
    else:
        wanted = [str(v) for v in levels]
        values = series.astype(str).to_numpy()
    present = set(np.unique(values).tolist())
    absent = [lv for lv in wanted if lv not in present]
    if absent:
        raise DataError(
            f"Sample '{sample}' ({key}) names level(s) {absent} of column '{series.name}', which do "
            "not occur in the data. Check the spelling of the levels."
        )
    return np.isin(values, wanted)


def _range(frame: pd.DataFrame, arg: dict, panel: Panel, sample: str) -> np.ndarray:
    keep = np.ones(len(frame), dtype=bool)
    for col, bounds in arg.items():
        if not pd.api.types.is_numeric_dtype(frame[col]):
            raise DataError(f"Sample '{sample}' sets a range on column '{col}', which is not numeric.")
        values = frame[col].to_numpy(dtype=float)
        if "min" in bounds:
            keep &= values >= panel.bound(col, bounds["min"])
        if "max" in bounds:
            keep &= values <= panel.bound(col, bounds["max"])
    return keep


def _keep(frame: pd.DataFrame, arg: dict, panel: Panel, sample: str) -> np.ndarray:
    keep = np.ones(len(frame), dtype=bool)
    for col, levels in arg.items():
        keep &= _level_match(frame[col], levels, sample=sample, key="keep")
    return keep


def _drop(frame: pd.DataFrame, arg: dict, panel: Panel, sample: str) -> np.ndarray:
    keep = np.ones(len(frame), dtype=bool)
    for col, levels in arg.items():
        keep &= ~_level_match(frame[col], levels, sample=sample, key="drop")
    return keep


def _periods_per_unit(frame: pd.DataFrame, panel: Panel) -> pd.Series:
    if panel.time is None:
        return frame.groupby(panel.unit, sort=False)[panel.unit].transform("size")
    return frame.groupby(panel.unit, sort=False)[panel.time].transform("nunique")


def _min_periods(frame: pd.DataFrame, arg: int, panel: Panel, sample: str) -> np.ndarray:
    return (_periods_per_unit(frame, panel) >= arg).to_numpy()


def _balanced(frame: pd.DataFrame, arg: bool, panel: Panel, sample: str) -> np.ndarray:
    if not arg:
        return np.ones(len(frame), dtype=bool)
    if panel.time is None:
        raise ConfigError(f"Sample '{sample}' asks for balanced units, which needs data.time.")
    n_periods = frame[panel.time].nunique()
    return (_periods_per_unit(frame, panel) == n_periods).to_numpy()


@dataclass(frozen=True)
class SampleFilter:
    """One kind of sample filter: how its config argument is canonicalised (``None``: no-op, left
    out of the sample's content), which columns it reads, and the rows it keeps."""

    key: str
    mask: Callable[[pd.DataFrame, Any, Panel, str], np.ndarray]
    canonical: Callable[[Any], Any]
    columns: Callable[[Any], set[str]] = lambda arg: set()


def _levels_by_column(arg: Mapping[str, Any]) -> dict[str, list[Any]] | None:
    out = {c: sorted(list(v), key=lambda level: json.dumps(level)) for c, v in sorted(arg.items())}
    return out or None


def _bounds_by_column(arg: Mapping[str, Any]) -> dict[str, dict[str, Any]] | None:
    return {c: dict(sorted(b.items())) for c, b in sorted(arg.items())} or None


def _named_columns(arg: Mapping[str, Any]) -> set[str]:
    return set(arg)


#: Filter key -> filter, in the order the filters apply. Adding a kind of filter touches this table
#: (and the schema's ``$defs/sample``), nothing else.
SAMPLE_FILTERS: dict[str, SampleFilter] = {f.key: f for f in (
    SampleFilter("range", _range, _bounds_by_column, _named_columns),
    SampleFilter("keep", _keep, _levels_by_column, _named_columns),
    SampleFilter("drop", _drop, _levels_by_column, _named_columns),
    SampleFilter("min_periods", _min_periods, lambda arg: arg),
    SampleFilter("balanced", _balanced, lambda arg: arg or None),
)}


def parse_sample(name: str, raw: Mapping[str, Any]) -> SampleDef:
    """Canonical form of one sample entry (without ``drop_each``, which the grid expands)."""
    filters: list[tuple[str, Any]] = []
    for key, kind in SAMPLE_FILTERS.items():
        if key in raw and (arg := kind.canonical(raw[key])) is not None:
            filters.append((key, arg))
    return SampleDef(name, tuple(filters))


def apply_sample(frame: pd.DataFrame, sample: SampleDef, panel: Panel) -> pd.DataFrame:
    """Rows of ``frame`` in ``sample``; an empty result is an error naming the sample."""
    out = frame
    for key, arg in sample.filters:
        out = out.loc[SAMPLE_FILTERS[key].mask(out, arg, panel, sample.name)]
    if len(out) == 0:
        raise DataError(
            f"Sample '{sample.name}' keeps no rows of the data: its filters "
            f"{json.dumps(sample.canonical())} exclude every observation."
        )
    return out


def sample_rows(frame: pd.DataFrame, sample: SampleDef, panel: Panel) -> np.ndarray:
    """Positions (0, 1, ...) of ``frame``'s rows in ``sample``; an empty sample raises as in :func:`apply_sample`."""
    part = apply_sample(frame.assign(__row__=np.arange(len(frame))), sample, panel)
    return part["__row__"].to_numpy()
