"""The ledger contract: one reader gives the same typed frame from the CSV and the Parquet file.

Data: statsmodels' Grunfeld investment data (see conftest.py), fitted in-process.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from fegrid.ledger import DIMENSIONS, LEDGER_COLUMNS, LEDGER_DTYPES, STATUSES, read_ledger
from fegrid.pipeline import fit_grid


def test_csv_and_parquet_read_back_to_the_same_typed_frame(tiny_project: Path, monkeypatch) -> None:
    monkeypatch.chdir(tiny_project)
    plan, ledger = fit_grid("grid.yaml")
    from_csv = read_ledger(plan.paths.ledger_csv)
    from_parquet = read_ledger(plan.paths.ledger_parquet)
    assert list(from_csv.columns) == list(LEDGER_COLUMNS)
    pd.testing.assert_frame_equal(from_csv, from_parquet, check_dtype=False)
    for col, kind in LEDGER_DTYPES.items():
        if kind == "string":
            assert pd.api.types.is_string_dtype(from_csv[col]), col
        else:
            assert str(from_csv[col].dtype) == kind, col
    assert set(from_csv["status"]) <= set(STATUSES)
    assert from_csv["is_baseline"].sum() == 1
    assert (from_csv["message"] == "").all() and from_csv["inference_warning"].map(lambda v: isinstance(v, str)).all()


def test_every_result_field_and_dimension_is_a_typed_column() -> None:
    assert set(LEDGER_DTYPES) == set(LEDGER_COLUMNS)
    assert LEDGER_COLUMNS[1: 1 + len(DIMENSIONS)] == DIMENSIONS
