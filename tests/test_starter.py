"""``fegrid init`` on open datasets (statsmodels' Grunfeld data, linearmodels' wage_panel): the
guessed panel keys, a config that passes ``fegrid check`` unchanged, and no overwriting."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from fegrid.cli import main
from fegrid.grid import read_yaml


@pytest.mark.parametrize("dataset,unit,time", [("grunfeld", "firm", "year"), ("wage_panel", "nr", "year")])
def test_init_guesses_the_panel_and_writes_a_config_that_checks(request, tmp_path: Path, monkeypatch, capsys,
                                                               dataset: str, unit: str, time: str) -> None:
    frame: pd.DataFrame = request.getfixturevalue(dataset)
    # the keys last, so the guess cannot rely on column order
    frame[[c for c in frame.columns if c not in (unit, time)] + [time, unit]].to_parquet(
        tmp_path / "panel.parquet", index=False)
    monkeypatch.chdir(tmp_path)
    assert main(["init", "panel.parquet", "--out", "grid.yaml"]) == 0
    assert f"unit '{unit}', time '{time}'" in capsys.readouterr().out
    text = (tmp_path / "grid.yaml").read_text()
    assert text.count("REVIEW") >= 2 and "PLACEHOLDER" in text
    raw = read_yaml(tmp_path / "grid.yaml")
    assert (raw["data"]["unit"], raw["data"]["time"]) == (unit, time)
    assert raw["outcomes"][0] not in (unit, time) and raw["focal_regressors"][0] not in (unit, time)
    assert main(["check", "--config", "grid.yaml"]) == 0
    checked = capsys.readouterr()
    assert "specifications" in checked.out
    # a baseline to review: the richest effects, clustered by the unit, every row, every control
    assert raw["baseline"]["absorb"] == "unit_time" and raw["baseline"]["sample"] == "all"
    assert raw["baseline"]["clustering"] == "unit" and "no baseline" not in checked.err
    assert raw["baseline"]["controls"] == "+".join(raw["control_sets"]["combinations_of"])
    # never over an existing config
    assert main(["init", "panel.parquet", "--out", "grid.yaml"]) == 2
    assert "never overwrites" in capsys.readouterr().err


def test_init_reads_monthly_dates(grunfeld: pd.DataFrame, tmp_path: Path, monkeypatch, capsys) -> None:
    """Grunfeld's years recoded as the first day of consecutive months: a monthly date column."""
    dated = grunfeld.assign(year=pd.Timestamp("2001-01-01") + pd.to_timedelta(0, "D")
                            + pd.to_timedelta((grunfeld["year"] - 1935) * 31, "D"))
    dated["year"] = dated["year"].dt.to_period("M").dt.to_timestamp()
    dated.rename(columns={"year": "month"}).to_csv(tmp_path / "monthly.csv", index=False)
    monkeypatch.chdir(tmp_path)
    assert main(["init", "monthly.csv", "--out", "g.yaml"]) == 0
    raw = read_yaml(tmp_path / "g.yaml")
    assert raw["data"]["time"] == "month" and raw["data"]["time_frequency"] == "monthly"
    assert main(["check", "--config", "g.yaml"]) == 0


def test_a_config_without_a_baseline_says_which_specification_stands_in(tiny_project: Path, monkeypatch,
                                                                      capsys) -> None:
    """Without a baseline the first specification by id is flagged (config/README.md): check, plan and run say
    so, naming it and its choices, before anything is fitted; a config that names one hears nothing."""
    from fegrid.pipeline import make_plan

    monkeypatch.chdir(tiny_project)
    assert main(["check", "--config", "grid.yaml"]) == 0
    assert "no baseline" not in capsys.readouterr().err
    text = "\n".join(line for line in (tiny_project / "grid.yaml").read_text().splitlines()
                     if not line.startswith("baseline:"))
    (tiny_project / "grid.yaml").write_text(text + "\n")
    plan = make_plan("grid.yaml")
    first = plan.specs[0]
    assert plan.grid.baseline_id(plan.specs) == first.spec_id
    for command in ("check", "plan"):
        assert main([command, "--config", "grid.yaml"]) == 0
        err = capsys.readouterr().err
        assert f"names no baseline, so the first specification by id ({first.spec_id}: focal " in err
        assert f"absorb {first.name('absorb')}" in err and "under 'baseline'" in err
