"""A staggered design through the grid, in process: config, ledger, coefficient table, figures and the
appendix section, on linearmodels' jobtraining panel (an open dataset: training grants given to firms in
1988 or 1989, Holzer et al. 1993). Bad declarations of the design fail with one clear paragraph."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
import yaml
from helpers import NEEDS_TEX, training_panel

import fegrid
from fegrid.cli import main
from fegrid.grid import load_config
from fegrid.pipeline import appendix, compile_appendix, draw_adoption, make_plan


def _config(folder: Path, **extra) -> dict:
    training_panel().to_csv(folder / "jobs.csv", index=False)
    raw = {
        "run_name": "jobs",
        "data": {"path": str(folder / "jobs.csv"), "unit": "fcode", "time": "year", "treatment": "trained",
                 "adoption": "grant_year"},
        "outcomes": ["lhrsemp"],
        "focal_regressors": ["trained"],
        "absorb": {"firm_year": ["fcode", "year"]},
        "clustering": {"firm": {"kind": "clustered", "by": "fcode"}, "robust": {"kind": "hc1"}},
        "samples": {"all": {}, "balanced": {"balanced": True}},
        "control_sets": {"named": {"none": [], "size": ["lemploy"]}},
        "estimators": {
            "two_way": {"method": "least_squares"},
            "events": {"method": "event_study", "window": [-1, 1]},
            "cohort_weighted": {"method": "interaction_weighted", "window": [-1, 1]},
            "imputed": {"method": "imputation", "window": [-1, 1]},
            "group_time": {"method": "group_time", "window": [-1, 1], "uniform_band_draws": 200},
        },
        "exclude": [{"estimator": "group_time", "controls": "size"}],
        "baseline": {"estimator": "two_way", "clustering": "firm", "sample": "balanced", "controls": "none"},
        "joint_inference": {"draws": 0},
    }
    raw.update(extra)
    return raw


def test_a_staggered_grid_gives_ledger_coefficients_figures_and_appendix(tmp_path, monkeypatch):
    raw = _config(tmp_path)
    monkeypatch.chdir(tmp_path)
    result = fegrid.fit_grid(raw, cache="reports", progress=False)
    led = result.ledger
    assert set(led["curve"]) == {"least_squares", "event_study", "interaction_weighted", "imputation", "group_time"}
    ok = led[led["status"] == "ok"]
    assert (led["status"] == "ok").all()
    # group-time effects leave out the units not observed in every period, and say so
    unbalanced = led[(led["estimator"] == "group_time") & (led["sample"] == "all")]
    assert unbalanced["message"].str.contains("5 unit.s. not observed in every period are left out").all()
    assert (unbalanced["n_obs"] == led.loc[(led["estimator"] == "group_time") & (led["sample"] == "balanced"),
                                           "n_obs"].iloc[0]).all()
    no_decomposition = led[(led["estimator"] == "two_way") & (led["sample"] == "all") & (led["controls"] == "none")]
    assert no_decomposition["message"].str.contains("no decomposition: .* balanced panel").all()
    assert (led["cohorts"] == 2).all()
    two_way = ok[(ok["estimator"] == "two_way") & (ok["sample"] == "balanced") & (ok["controls"] == "none")]
    assert (two_way["decomposition"] != "").all() and two_way["already_treated_weight"].between(0, 1).all()
    assert (ok.loc[ok["estimator"] == "two_way", "negative_weights"] >= 0).all()
    coefs = result.coefficients()
    events = coefs[coefs["spec_id"].isin(ok.loc[ok["estimator"] == "events", "spec_id"])]
    assert {"trained", "rel=+0", "rel=+1"} <= set(events["term"])  # the reference period -1 is left out
    assert "rel=-1" not in set(events["term"])
    # the exhibits: both figures of the design, then the appendix with its section, which compiles
    grid = load_config(raw)
    plan = make_plan(raw, root="reports")
    figs = {f"{kind}_{ext}": plan.paths.adoption_figure(kind, "lhrsemp--trained", ext)
            for kind in ("event", "decomposition") for ext in ("png", "pdf")}
    draw_adoption(grid, plan.paths.ledger_parquet, plan.paths.coefficients_parquet, "lhrsemp--trained", figs)
    assert all(Path(p).stat().st_size > 5000 for p in figs.values())
    assert set(plan.adoption_figure_paths("pdf")) == {figs["event_pdf"], figs["decomposition_pdf"]}
    joint = plan.paths.file("joint_tests.csv")
    pd.DataFrame(columns=["outcome", "focal", "curve", "statistic", "observed", "p_value", "draws", "specs",
                          "dominant_sign"]).to_csv(joint, index=False)
    for pair_fig in plan.figure_paths("pdf"):
        from fegrid.pipeline import draw_figure

        draw_figure(grid, plan.paths.ledger_parquet, pair_fig.stem[len("curve-"):], pair_fig.with_suffix(".png"),
                    pair_fig)
    tex = plan.paths.file("appendix.tex")
    appendix(grid, plan.paths.ledger_parquet, joint, tex, None)
    text = tex.read_text()
    assert "Staggered adoption: trained on lhrsemp" in text
    assert "Goodman-Bacon 2021, Theorem 1" in text and "Roth 2022" in text
    # a results table of the design shows the pre-trend test and the decomposition's share, from the ledger
    from fegrid.tables import grid_tables, markdown_table

    raw["tables"] = {"design": {"columns": [{}, {"estimator": "imputed"}, {"estimator": "group_time"}]}}
    table = markdown_table(grid_tables(load_config(raw), led)["design"])
    imputed = ok[(ok["estimator"] == "imputed") & (ok["clustering"] == "firm") & (ok["sample"] == "balanced")
                 & (ok["controls"] == "none")].iloc[0]
    assert f"| Pre-trend test, p-value |  | {imputed['pretrend_p_value']:.3f} |" in table
    assert f"| Weight on already-treated controls | {two_way['already_treated_weight'].iloc[0]:.3f} |" in table


@NEEDS_TEX
def test_the_staggered_appendix_compiles(tmp_path, monkeypatch):
    raw = _config(tmp_path)
    monkeypatch.chdir(tmp_path)
    fegrid.fit_grid(raw, cache="reports", progress=False)
    grid = load_config(raw)
    plan = make_plan(raw, root="reports")
    figs = {f"{kind}_{ext}": plan.paths.adoption_figure(kind, "lhrsemp--trained", ext)
            for kind in ("event", "decomposition") for ext in ("png", "pdf")}
    draw_adoption(grid, plan.paths.ledger_parquet, plan.paths.coefficients_parquet, "lhrsemp--trained", figs)
    from fegrid.pipeline import draw_figure

    for pair_fig in plan.figure_paths("pdf"):
        draw_figure(grid, plan.paths.ledger_parquet, pair_fig.stem[len("curve-"):], pair_fig.with_suffix(".png"),
                    pair_fig)
    joint = plan.paths.file("joint_tests.csv")
    pd.DataFrame(columns=["outcome", "focal", "curve", "statistic", "observed", "p_value", "draws", "specs",
                          "dominant_sign"]).to_csv(joint, index=False)
    tex = plan.paths.file("appendix.tex")
    appendix(grid, plan.paths.ledger_parquet, joint, tex, None)
    pdf = plan.paths.file("appendix.pdf")
    compile_appendix(tex, pdf)
    assert pdf.stat().st_size > 20000


def _refused(raw: dict, folder: Path, words: str, capsys) -> None:
    """The CLI's check refuses the config in one paragraph naming the fault, with exit code 2."""
    path = folder / "grid.yaml"
    path.write_text(yaml.safe_dump(raw))
    assert main(["check", "--config", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("fegrid: error: ") and err.count("\n") == 1 and "Traceback" not in err
    assert words in err, err


@pytest.mark.parametrize("change, words", [
    ({"data": {"treatment": None}}, "declare the 0/1 treatment column in data.treatment"),
    ({"focal_regressors": ["lemploy"]}, "not among focal_regressors"),
    ({"estimators": {"e": {"method": "event_study", "window": [1, 3]}}}, "must start before 0"),
    ({"estimators": {"e": {"method": "event_study", "reference": -5, "window": [-2, 2]}}}, "reference period -5"),
    ({"estimators": {"e": {"method": "imputation", "controls_from": "never_treated"}}},
     "controls_from 'never_treated' is not available for method imputation"),
    ({"estimators": {"e": {"method": "least_squares", "window": [-2, 2]}}},
     "window belong to the staggered-adoption methods"),
])
def test_bad_declarations_name_the_key(tmp_path, change, words, capsys):
    raw = _config(tmp_path)
    for key, value in change.items():
        if key == "data":
            raw["data"] = {k: v for k, v in {**raw["data"], **value}.items() if v is not None}
            raw["data"].pop("adoption", None)
        else:
            raw[key] = value
    if "estimators" in change:
        raw.pop("exclude")
        raw.pop("baseline")
    _refused(raw, tmp_path, words, capsys)


@pytest.mark.parametrize("damage, words", [
    ("switch_off", "switches 'trained' off in period 1989"),
    ("disagree", "the treatment must be 1 exactly from the adoption period on"),
    ("two_dates", "takes several values for unit"),
])
def test_bad_adoption_data_is_refused_before_fitting(tmp_path, damage, words, capsys):
    raw = _config(tmp_path)
    data = pd.read_csv(tmp_path / "jobs.csv")
    treated = data.index[(data["trained"] == 1) & (data["year"] == 1988)][-1]
    if damage == "switch_off":
        firm = data.loc[treated, "fcode"]
        data.loc[(data["fcode"] == firm) & (data["year"] == 1989), "trained"] = 0
        raw["data"].pop("adoption")
    elif damage == "disagree":
        data.loc[treated, "trained"] = 0
    else:
        data.loc[treated, "grant_year"] = 1987
    data.to_csv(tmp_path / "jobs.csv", index=False)
    _refused(raw, tmp_path, words, capsys)


def test_declaring_the_treatment_changes_no_least_squares_id(tmp_path):
    raw = _config(tmp_path)
    raw["estimators"] = {"two_way": {"method": "least_squares"}}
    raw.pop("exclude")
    with_design = {s.spec_id for s in load_config(raw).expand()}
    plain = dict(raw, data={k: v for k, v in raw["data"].items() if k not in ("treatment", "adoption")})
    assert {s.spec_id for s in load_config(plain).expand()} == with_design
    # ... but the fit jobs' settings (and so their cached results) do change: the diagnostics are new
    assert load_config(plain).settings_key() != load_config(raw).settings_key()
