"""Data-level caching: a corrected value refits only the specifications that read it.

Data: statsmodels' Grunfeld investment data (see conftest.py); the grid is conftest's tiny grid,
fitted in-process with the functions the Snakemake rules call.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest

from fegrid.pipeline import fit_grid


def _work(plan) -> dict[str, int]:
    logs = [json.loads(plan.paths.work_log(job.key).read_text()) for job in plan.jobs]
    return {k: sum(log[k] for log in logs) for k in ("specs_fitted", "specs_reused", "columns_demeaned",
                                                     "columns_reused")}


@pytest.fixture()
def fitted(tiny_project: Path, monkeypatch) -> tuple[Path, pd.DataFrame]:
    monkeypatch.chdir(tiny_project)
    plan, ledger = fit_grid("grid.yaml")
    assert _work(plan)["specs_fitted"] == len(ledger) and _work(plan)["specs_reused"] == 0
    return tiny_project, ledger


def test_a_corrected_value_refits_only_the_specifications_that_read_it(fitted, tmp_path_factory) -> None:
    folder, ledger = fitted
    data = pd.read_csv(folder / "grunfeld.csv")
    row = (data["firm"] == "IBM") & (data["year"] == 1940)  # before 1946: outside the post-war sample
    data.loc[row, "capital"] += 1.0
    data.to_csv(folder / "grunfeld.csv", index=False)
    plan, after = fit_grid("grid.yaml")
    # every block (sample, effects, weights) of the full sample reads capital somewhere: those refit;
    # the post-war sample does not hold the corrected row and is reused whole
    reads_it = ledger["sample"] == "all"
    work = _work(plan)
    assert work["specs_fitted"] == int(reads_it.sum()) and work["specs_reused"] == int((~reads_it).sum())
    assert 0 < work["columns_demeaned"] and work["columns_reused"] > 0
    moved = after.set_index("spec_id")["estimate"] != ledger.set_index("spec_id")["estimate"]
    assert set(moved[moved].index) <= set(ledger.loc[reads_it, "spec_id"])
    # the ledger equals a cold fit of the corrected data, byte for byte
    cold = tmp_path_factory.mktemp("cold")
    for name in ("grunfeld.csv", "grid.yaml"):
        (cold / name).write_bytes((folder / name).read_bytes())
    with pytest.MonkeyPatch.context() as mp:
        mp.chdir(cold)
        fit_grid("grid.yaml")
    assert (cold / "reports/tiny/ledger.csv").read_bytes() == (folder / "reports/tiny/ledger.csv").read_bytes()


def test_a_new_column_in_the_file_refits_and_demeans_nothing(fitted) -> None:
    folder, ledger = fitted
    data = pd.read_csv(folder / "grunfeld.csv")
    data.assign(notes=range(len(data))).to_csv(folder / "grunfeld.csv", index=False)
    plan, after = fit_grid("grid.yaml")
    work = _work(plan)
    assert work["specs_fitted"] == 0 and work["specs_reused"] == len(ledger)
    pd.testing.assert_frame_equal(after, ledger)
