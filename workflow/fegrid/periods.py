"""Dates as periods: a time column of dates (or period labels) becomes consecutive integers.

Monthly and quarterly panels often carry their time as a date (``2019-03-01``) or a label
(``2019-03``, ``2019Q1``). Trends, balance and gaps need consecutive integers, so with a declared
frequency (``data.time_frequency``) the time column is numbered by period:

* monthly: ``12 * year + month - 1``
* quarterly: ``4 * year + quarter - 1``
* yearly: the year

Two dates in the same period get the same number (and, for one unit, are duplicate panel keys).

>>> import pandas as pd
>>> period_numbers(pd.Series(["2019-11-30", "2019-12-01", "2020-01-15"]), "monthly", column="month").tolist()
[24238, 24239, 24240]
>>> period_numbers(pd.Series(["2019Q4", "2020Q1"]), "quarterly", column="quarter").tolist()
[8079, 8080]
>>> period_number("2020-01", "monthly")
24240
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from .errors import DataError

__all__ = ["FREQUENCIES", "period_numbers", "period_number"]

#: The frequencies a time column can be declared with, and pandas' period code of each.
FREQUENCIES = {"monthly": "M", "quarterly": "Q", "yearly": "Y"}


def _numbers(periods: pd.PeriodIndex, frequency: str) -> np.ndarray:
    year = periods.year.to_numpy(dtype=np.int64)
    if frequency == "monthly":
        return 12 * year + periods.month.to_numpy(dtype=np.int64) - 1
    if frequency == "quarterly":
        return 4 * year + periods.quarter.to_numpy(dtype=np.int64) - 1
    return year


def period_numbers(values: pd.Series, frequency: str, *, column: str) -> pd.Series:
    """Dates, pandas periods or period labels in ``values`` as consecutive period numbers."""
    code = FREQUENCIES[frequency]
    try:
        if isinstance(values.dtype, pd.PeriodDtype):
            periods = pd.PeriodIndex(values).asfreq(code)
        elif pd.api.types.is_datetime64_any_dtype(values):
            periods = pd.PeriodIndex(pd.DatetimeIndex(values).tz_localize(None), freq=code)
        elif frequency == "yearly" and pd.api.types.is_integer_dtype(values):
            return values.astype(np.int64)
        else:
            periods = pd.PeriodIndex([pd.Period(str(v), freq=code) if pd.notna(v) else pd.NaT for v in values],
                                     freq=code)
    except (ValueError, TypeError) as exc:
        example = values.dropna().astype(str).head(3).tolist()
        raise DataError(
            f"The time column '{column}' is declared {frequency} (data.time_frequency) but its values, such as "
            f"{example}, cannot be read as {frequency} dates or periods ({exc})."
        ) from None
    if periods.isna().any():
        raise DataError(f"The time column '{column}' has {int(periods.isna().sum())} missing value(s); every "
                        "observation needs a period.")
    return pd.Series(_numbers(periods, frequency), index=values.index, name=values.name)


def period_number(value: Any, frequency: str) -> int:
    """One date or period label (a sample's range bound) as its period number."""
    return int(period_numbers(pd.Series([value]), frequency, column="(range bound)").iloc[0])
