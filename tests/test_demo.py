"""The README's demo, end to end, in a fresh folder: INVENTED orchard data, the demo grid, every
report; the appendix PDF must show the baseline estimate as the ledger has it."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from fegrid.demo import TRUE_COUNT_EFFECT, TRUE_EFFECT, cover_crop_effect
from fegrid.locations import DEMO_CONFIG

pytestmark = pytest.mark.slow


def test_demo_end_to_end(tmp_path: Path, fegrid_env) -> None:
    config = DEMO_CONFIG
    proc = subprocess.run([sys.executable, "-m", "fegrid.cli", "run", "--config", str(config), "-c", "2"],
                          cwd=tmp_path, capture_output=True, text=True, env=fegrid_env, timeout=3000)
    assert proc.returncode == 0, proc.stderr[-4000:]
    run = tmp_path / "reports" / "demo"
    ledger = pd.read_csv(run / "ledger.csv")
    assert len(ledger) == 626
    assert ledger["estimator"].value_counts().to_dict() == {
        "least_squares": 580, "iv_canal": 10, "poisson": 8, "event_study": 8, "interaction_weighted": 8,
        "imputation": 8, "group_time_never": 2, "group_time_not_yet": 2}
    base = ledger[ledger["is_baseline"]].iloc[0]
    # the invented truth is recovered by the baseline within its interval; pooled OLS overstates it
    assert base["ci_low"] <= TRUE_EFFECT <= base["ci_high"]
    pooled = ledger[(ledger["absorb"] == "pooled") & (ledger["focal"] == "irrigation")]
    least_squares = pooled["estimator"] == "least_squares"
    assert (pooled.loc[least_squares, "estimate"] > 3 * TRUE_EFFECT).all()
    # the canal lottery is unrelated to soil, so 2SLS recovers the truth even without orchard effects
    iv_pooled = pooled[pooled["estimator"] == "iv_canal"]
    assert len(iv_pooled) == 2 and ((iv_pooled["ci_low"] <= TRUE_EFFECT) & (TRUE_EFFECT <= iv_pooled["ci_high"])).all()
    organic = ledger[(ledger["focal"] == "organic") & (ledger["absorb"] != "pooled")]
    assert (organic["status"] == "not_identified").all()
    assert "fertilizer" in ledger["controls"].to_string()
    # the other estimators: 2SLS with the (strong, invented) canal lottery recovers the truth under
    # orchard effects; Poisson PML recovers the invented count effect; separated orchards are counted
    iv = ledger[(ledger["estimator"] == "iv_canal") & (ledger["absorb"] == "orchard_season")]
    assert ((iv["ci_low"] <= TRUE_EFFECT) & (TRUE_EFFECT <= iv["ci_high"])).all()
    assert (iv["effective_f"] > 100).all() and iv["ar_set"].str.startswith("[").all()
    pml = ledger[(ledger["estimator"] == "poisson") & (ledger["absorb"] == "orchard_season")]
    assert ((pml["ci_low"] <= TRUE_COUNT_EFFECT) & (TRUE_COUNT_EFFECT <= pml["ci_high"])).all()
    assert (pml["n_separated"] > 0).all() and (pml["curve"] == "poisson_pml").all()
    coefficients = pd.read_csv(run / "coefficients.csv")
    kept = coefficients[coefficients["spec_id"] == base["spec_id"]].set_index("term")
    assert list(kept.index) == ["irrigation", "fertilizer", "rainfall"]
    assert kept.loc["irrigation", "estimate"] == pytest.approx(base["estimate"], rel=1e-12)
    total = base["combination_irrigation_and_fertilizer_estimate"]
    assert total == pytest.approx(kept.loc["irrigation", "estimate"] + kept.loc["fertilizer", "estimate"], rel=1e-10)
    assert 0 <= base["combination_weather_and_inputs_p_value"] <= 1

    # the staggered adoption of cover crops: the two-way estimate falls far short of the invented average
    # effect on the treated; the heterogeneity-robust estimators recover it
    cover = ledger[ledger["focal"] == "cover_crop"]
    data = pd.read_csv(tmp_path / "data/demo/orchards.csv")
    treated = data[data["cover_crop"] == 1]
    balanced = data.groupby("orchard")["season"].transform("size") == data["season"].nunique()
    truth = {"all": cover_crop_effect(treated["season"], treated["cover_crop_season"]).mean(),
             "balanced": cover_crop_effect(data.loc[balanced & (data["cover_crop"] == 1), "season"],
                                           data.loc[balanced & (data["cover_crop"] == 1), "cover_crop_season"]).mean()}
    two_way = cover[cover["estimator"] == "least_squares"]
    assert (two_way["ci_high"] < 0.5 * truth["all"]).all() and (two_way["negative_weights"] > 0).all()
    with_decomposition = two_way[two_way["decomposition"].fillna("") != ""]
    assert len(with_decomposition) == 2 and (with_decomposition["already_treated_weight"] > 0.2).all()
    robust = cover[cover["estimator"].isin(["interaction_weighted", "imputation", "group_time_never",
                                            "group_time_not_yet"]) & (cover["status"] == "ok")]
    assert len(robust) == 20
    for _, row in robust.iterrows():
        assert abs(row["estimate"] - truth[row["sample"]]) < 0.1 * truth[row["sample"]], row["spec_id"]
    for name in ("figures/event-soil_carbon--cover_crop.pdf", "figures/decomposition-soil_carbon--cover_crop.pdf",
                 "tables/adoption.md"):
        assert (run / name).is_file(), name

    joint = pd.read_csv(run / "joint_tests.csv")
    assert (joint["draws"] == 500).all()
    # resampling orchards, the valley and orchard x season clusterings keep a drawn orchard's copies together:
    # the joint tests' report and the appendix say so
    caution = "orchard_season (by season); valley (by valley); valley_wild (by valley)"
    assert caution in (run / "joint_tests.md").read_text()
    assert caution.replace("_", "\\_") in (run / "appendix.tex").read_text()
    assert sorted(joint["curve"].unique()) == ["event_study", "group_time", "imputation", "interaction_weighted",
                                               "least_squares", "poisson_pml", "two_stage_least_squares"]
    for name in ("manifest.json", "REPLICATION.md", "summary.tex", "appendix.tex", "environment-lock.txt",
                 "Dockerfile", "tables/main.tex", "tables/main.md", "tables/main.html",
                 "figures/curve-log_yield--irrigation.pdf", "tables/estimators.md", "coefficients.parquet",
                 "figures/curve-log_yield--irrigation--two_stage_least_squares.pdf",
                 "figures/curve-frost_damaged_trees--irrigation--poisson_pml.pdf"):
        assert (run / name).is_file(), name
    # REPLICATION.md: every section of the data editors' template, each filled from the config and the run
    replication = (run / "REPLICATION.md").read_text()
    for heading in ("### Overview", "### Data availability and provenance statements", "### Dataset list",
                    "### Computational requirements", "#### Controlled randomness", "### Description of programs/code",
                    "### Instructions to replicators", "### List of tables and programs", "### References"):
        assert heading in replication, heading
    assert "Not given" not in replication and "| Table 1 | table_main_tex |" in replication
    assert "| Figure 1 | figure_log_yield_irrigation_pdf |" in replication
    # the main table: the baseline in column (1), as in the ledger
    main_md = (run / "tables/main.md").read_text()
    assert f"{base['estimate']:.4f}***" in main_md.replace("\\*", "*") and "(1)" in main_md
    if shutil.which("pdflatex"):
        text = subprocess.run(["pdftotext", "-layout", str(run / "appendix.pdf"), "-"], capture_output=True,
                              text=True).stdout
        assert f"{base['estimate']:.4f}" in text
        assert "Irrigation and orchard yields (invented data)" in text  # the main table, inside the appendix
        assert "Staggered adoption: Cover crop on Soil carbon" in text
