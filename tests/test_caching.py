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


def test_a_one_row_correction_in_the_demo_refits_only_samples_holding_it(tmp_path: Path, monkeypatch) -> None:
    """On the INVENTED demo panel and grid (config/config.yaml): a rainfall value of season 2 in
    valley V01 is corrected. Samples without that row (seasons from 4 on, the sample leaving V01 out)
    are not refitted, and the ledger equals a cold fit of the corrected data."""
    from fegrid.demo import write_demo_data
    from fegrid.locations import DEMO_CONFIG

    monkeypatch.chdir(tmp_path)
    (tmp_path / "grid.yaml").write_text(DEMO_CONFIG.read_text())
    write_demo_data(tmp_path / "data/demo/orchards.csv")
    plan, ledger = fit_grid("grid.yaml")
    data = pd.read_csv("data/demo/orchards.csv")
    row = data.index[(data["season"] == 2) & (data["valley"] == "V01")][0]
    data.loc[row, "rainfall"] += 0.5
    data.to_csv("data/demo/orchards.csv", index=False)
    plan, after = fit_grid("grid.yaml")
    work = _work(plan)
    holds_row = ~ledger["sample"].isin(["from_season_4", "leave_one_valley_out:V01"])
    assert work["specs_reused"] >= int((~holds_row).sum()) > 0
    assert work["specs_fitted"] <= int(holds_row.sum())
    assert work["columns_reused"] > work["columns_demeaned"] > 0  # most demeaning is kept
    cold = tmp_path / "cold"
    (cold / "data/demo").mkdir(parents=True)
    (cold / "data/demo/orchards.csv").write_bytes((tmp_path / "data/demo/orchards.csv").read_bytes())
    (cold / "grid.yaml").write_bytes((tmp_path / "grid.yaml").read_bytes())
    monkeypatch.chdir(cold)
    fit_grid("grid.yaml")
    assert (cold / "reports/demo/ledger.csv").read_bytes() == (tmp_path / "reports/demo/ledger.csv").read_bytes()


def test_an_unchanged_config_and_data_read_the_saved_plan(tiny_project: Path, monkeypatch) -> None:
    """The second plan of the same config and data is read back, not expanded again; a changed
    config (or data file) plans anew. Data: statsmodels' Grunfeld (conftest)."""
    from fegrid.grid import Grid
    from fegrid.pipeline import make_plan, save_plan

    monkeypatch.chdir(tiny_project)
    first = make_plan("grid.yaml")
    save_plan(first)

    def no_expansion(self, levels=None):
        raise AssertionError("the grid was expanded again")

    with monkeypatch.context() as mp:
        mp.setattr(Grid, "expand", no_expansion)
        again = make_plan("grid.yaml")
    assert [s.spec_id for s in again.specs] == [s.spec_id for s in first.specs]
    assert [j.key for j in again.jobs] == [j.key for j in first.jobs] and again.paths == first.paths
    text = (tiny_project / "grid.yaml").read_text().replace("seed: 7", "seed: 8")
    (tiny_project / "grid.yaml").write_text(text)
    changed = make_plan("grid.yaml")
    assert changed.grid.seed == 8 and changed.joint_key != first.joint_key
