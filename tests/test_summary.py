"""Curve summaries and what each choice does to the estimate. Data: a grid over linearmodels'
wage_panel (tests/helpers.py)."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
from helpers import fit_in_process, wage_grid

from fegrid.report import write_summaries
from fegrid.summary import curve_summary


@pytest.fixture(scope="module")
def wage_ledger(tmp_path_factory, wage_panel) -> pd.DataFrame:
    folder = tmp_path_factory.mktemp("wage")
    return fit_in_process(wage_grid(folder, wage_panel), folder)


def test_summary_counts_and_baseline_percentile(wage_ledger: pd.DataFrame, tmp_path: Path) -> None:
    summ = curve_summary(wage_ledger, 0.95)
    union = summ[summ["focal"] == "union"].iloc[0]
    part = wage_ledger[wage_ledger["focal"] == "union"]
    ok = part[part["status"] == "ok"]
    assert union["specs"] == len(part) and union["fitted"] == len(ok)
    assert union["median"] == pytest.approx(ok["estimate"].median())
    # the baseline's percentile, checked on the curve that holds the baseline (whichever focal it has)
    base = wage_ledger[wage_ledger["is_baseline"]].iloc[0]
    curve = wage_ledger[(wage_ledger["focal"] == base["focal"]) & (wage_ledger["status"] == "ok")]["estimate"]
    row = summ[summ["focal"] == base["focal"]].iloc[0]
    below, ties = (curve < base["estimate"]).sum(), (curve == base["estimate"]).sum()
    assert ties >= 1
    assert row["baseline_percentile"] == pytest.approx(100 * (below + 0.5 * ties) / len(curve), abs=1e-9)
    assert row["baseline_estimate"] == base["estimate"]
    paths = write_summaries(wage_ledger, 0.95, tmp_path)
    assert pd.read_csv(paths["summary_csv"]).shape[0] == 2
    assert "| outcome" in paths["summary_md"].read_text()
    assert r"\toprule" in paths["summary_tex"].read_text()


def test_choice_effects_are_measured_on_matched_specifications(wage_ledger: pd.DataFrame) -> None:
    """A clustering choice cannot move a point estimate (published identity: the covariance does
    not enter the coefficient). With exclusions that make the choices' sets of specifications
    differ, plain medians per choice differ anyway; matched shifts must be exactly zero."""
    from fegrid.summary import choice_medians

    # exclude iid errors from every pooled and every balanced-sample specification: the clustering
    # choices now cover different specifications
    led = wage_ledger[~((wage_ledger["clustering"] == "iid")
                        & wage_ledger["absorb"].isin(["pooled", "worker"]))].reset_index(drop=True)
    moves = choice_medians(led)
    clus = moves[(moves["focal"] == "union") & (moves["dimension"] == "clustering")].set_index("choice")
    assert clus.loc["iid", "median"] != pytest.approx(clus.loc["robust", "median"])  # composition differs
    assert (clus["matched_shift"].abs() < 1e-12).all() and (clus["dimension_effect"] < 1e-12).all()
    assert (clus.drop(index=clus["reference"].iloc[0])["matched_pairs"] > 0).all()
    absorb = moves[(moves["focal"] == "union") & (moves["dimension"] == "absorb")].set_index("choice")
    # the matched shift of a choice is the median of paired differences, checked by hand for one
    ok = led[(led["status"] == "ok") & (led["focal"] == "union")]
    others = [d for d in ("outcome", "focal", "clustering", "sample", "controls", "weights")]
    ref = absorb["reference"].iloc[0]
    pairs = ok[ok["absorb"] == "pooled"].merge(ok[ok["absorb"] == ref], on=others, suffixes=("", "_ref"))
    assert absorb.loc["pooled", "matched_pairs"] == len(pairs)
    assert absorb.loc["pooled", "matched_shift"] == pytest.approx((pairs["estimate"] - pairs["estimate_ref"]).median())


def test_summary_markdown_prints_blanks_and_one_row_per_family(wage_panel: pd.DataFrame, tmp_path: Path) -> None:
    """On linearmodels' wage_panel: `black` never varies within a worker, so its curve has no fitted
    baseline (blank, not "nan"); a leave-one-occupation-out family is one row of the choices table,
    its specifications the sum of its levels' (counted by pandas)."""
    import re

    raw = wage_grid(tmp_path, wage_panel, focal_regressors=["union", "black"],
                    absorb={"worker": ["nr"], "pooled": []},
                    samples={"all": {}, "without_occupation": {"drop_each": "occupation"}},
                    control_sets={"named": {"none": []}})
    ledger = fit_in_process(raw, tmp_path)
    paths = write_summaries(ledger, 0.95, tmp_path / "out")
    text = paths["summary_md"].read_text()
    assert not re.search(r"\|\s*nan\s*\|", text)
    family = [line for line in text.splitlines() if "without_occupation" in line and "| union" in line
              and "| sample" in line]
    assert len(family) == 1 and "without_occupation (each of 9)" in family[0]
    fitted = ledger[(ledger["focal"] == "union") & ledger["sample"].str.startswith("without_occupation:")
                    & (ledger["status"] == "ok")]
    assert f"| {len(fitted)} " in family[0].replace("  ", " ").replace("  ", " ") or str(len(fitted)) in family[0]
    # choices.csv keeps every level
    assert pd.read_csv(paths["choices_csv"])["choice"].str.startswith("without_occupation:").sum() >= 9


def test_estimates_of_another_method_are_their_own_curve(wage_ledger: pd.DataFrame, tmp_path: Path) -> None:
    """The same outcome and focal regressor estimated by another method (here relabelled) is a second
    curve in every summary: its own row, named by its curve, never pooled with least squares."""
    other = wage_ledger.assign(spec_id=wage_ledger["spec_id"] + "x", estimator="iv", curve="two_stage_least_squares",
                               is_baseline=False, estimate=wage_ledger["estimate"] * 10)
    both = pd.concat([wage_ledger, other], ignore_index=True)
    summ = curve_summary(both, 0.95)
    assert len(summ) == 2 * len(curve_summary(wage_ledger, 0.95))
    iv = summ[summ["curve"] == "two_stage_least_squares"]
    ls = summ[summ["curve"] == "least_squares"]
    pd.testing.assert_series_equal(iv.set_index("focal")["median"], 10 * ls.set_index("focal")["median"], rtol=1e-12)
    paths = write_summaries(both, 0.95, tmp_path)
    assert "two_stage_least_squares" in paths["summary_md"].read_text()
    assert "[two\\_stage\\_least\\_squares]" in paths["summary_tex"].read_text()
