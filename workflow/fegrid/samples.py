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

__all__ = ["SampleDef", "Panel", "SAMPLE_FILTERS", "apply_sample", "parse_sample"]


@dataclass(frozen=True)
class Panel:
    """The panel's key columns."""

    unit: str
    time: str | None = None


@dataclass(frozen=True)
class SampleDef:
    """A named sample: filter key -> argument, in canonical (JSON-ready, sorted) form."""

    name: str
    filters: tuple[tuple[str, Any], ...] = ()

    def canonical(self) -> dict[str, Any]:
        return {k: v for k, v in self.filters}

    def columns(self) -> set[str]:
        cols: set[str] = set()
        for key, arg in self.filters:
            if key in ("range", "keep", "drop"):
                cols.update(arg)
        return cols


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
            keep &= values >= bounds["min"]
        if "max" in bounds:
            keep &= values <= bounds["max"]
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


#: Filter key -> function, in the order the filters apply.
SAMPLE_FILTERS: dict[str, Callable[[pd.DataFrame, Any, Panel, str], np.ndarray]] = {
    "range": _range,
    "keep": _keep,
    "drop": _drop,
    "min_periods": _min_periods,
    "balanced": _balanced,
}


def _canonical_levels(levels: list[Any]) -> list[Any]:
    return sorted(levels, key=lambda v: json.dumps(v))


def parse_sample(name: str, raw: Mapping[str, Any]) -> SampleDef:
    """Canonical form of one sample entry (without ``drop_each``, which the grid expands)."""
    filters: list[tuple[str, Any]] = []
    for key in SAMPLE_FILTERS:
        if key not in raw:
            continue
        arg = raw[key]
        if key in ("keep", "drop"):
            arg = {c: _canonical_levels(list(v)) for c, v in sorted(arg.items())}
            if not arg:
                continue
        elif key == "range":
            arg = {c: dict(sorted(b.items())) for c, b in sorted(arg.items())}
            if not arg:
                continue
        elif key == "balanced" and not arg:
            continue
        filters.append((key, arg))
    return SampleDef(name, tuple(filters))


def apply_sample(frame: pd.DataFrame, sample: SampleDef, panel: Panel) -> pd.DataFrame:
    """Rows of ``frame`` in ``sample``; an empty result is an error naming the sample."""
    out = frame
    for key, arg in sample.filters:
        out = out.loc[SAMPLE_FILTERS[key](out, arg, panel, sample.name)]
    if len(out) == 0:
        raise DataError(
            f"Sample '{sample.name}' keeps no rows of the data: its filters "
            f"{json.dumps(sample.canonical())} exclude every observation."
        )
    return out
