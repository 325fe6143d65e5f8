"""Unit tests of small parts: covariance kinds, atomic writes, sample filters, the CLI's summary.

Data: statsmodels' Grunfeld investment data (see conftest.py); references: statsmodels' OLS with
its covariance options (a general-purpose reference library) and pandas computations written out.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from fegrid.cli import main
from fegrid.estimate import Inference, fit_one
from fegrid.samples import SAMPLE_FILTERS, Panel, apply_sample, parse_sample
from fegrid.store import atomic_write, write_text

PANEL = Panel(unit="firm", time="year")


# ---- covariance kinds -----------------------------------------------------------------------------

@pytest.mark.parametrize("kind", ["homoskedastic", "hc1", "clustered"])
def test_each_covariance_kind_equals_statsmodels_on_pooled_ols(grunfeld: pd.DataFrame, kind: str) -> None:
    """Source: statsmodels OLS with a constant: nonrobust, HC1, and cluster (G/(G-1)(N-1)/(N-K),
    the same small-sample factor; pooled OLS has no absorbed effect nested in the clusters)."""
    import statsmodels.api as sm

    by = (("firm",),) if kind == "clustered" else ()
    ours = fit_one(grunfeld, "invest", "value", controls=["capital"], absorb=(), inference=Inference(kind, by))
    model = sm.OLS(grunfeld["invest"], sm.add_constant(grunfeld[["value", "capital"]]))
    options = {"homoskedastic": {"cov_type": "nonrobust"}, "hc1": {"cov_type": "HC1"},
               "clustered": {"cov_type": "cluster", "cov_kwds": {"groups": pd.factorize(grunfeld["firm"])[0]}}}
    ref = model.fit(**options[kind])
    assert ours.estimate == pytest.approx(ref.params["value"], rel=1e-10)
    assert ours.std_error == pytest.approx(ref.bse["value"], rel=1e-9)
    expected_df = grunfeld["firm"].nunique() - 1 if kind == "clustered" else len(grunfeld) - 3
    assert ours.df_inference == expected_df


def test_twoway_is_the_sum_of_its_one_way_parts(grunfeld: pd.DataFrame) -> None:
    """Published identity (Cameron, Gelbach & Miller 2011): V = V_firm + V_year - V_firm x year; with
    one observation per firm-year the intersection is the heteroskedasticity-robust sandwich."""
    kw = {"controls": ["capital"], "absorb": ()}
    firm = fit_one(grunfeld, "invest", "value", inference=Inference("clustered", (("firm",),)), **kw)
    year = fit_one(grunfeld, "invest", "value", inference=Inference("clustered", (("year",),)), **kw)
    both = fit_one(grunfeld, "invest", "value", inference=Inference("two_way_clustered", (("firm",), ("year",))), **kw)
    n, k = len(grunfeld), 3
    g_f, g_y = grunfeld["firm"].nunique(), grunfeld["year"].nunique()
    raw = lambda se, g: se**2 / (g / (g - 1) * (n - 1) / (n - k))  # noqa: E731 - undo one factor
    hetero = fit_one(grunfeld, "invest", "value", inference=Inference("hc1"), **kw).std_error ** 2 * (n - k) / n
    expected = (g_f / (g_f - 1) * raw(firm.std_error, g_f) + g_y / (g_y - 1) * raw(year.std_error, g_y)
                - n / (n - 1) * hetero) * (n - 1) / (n - k)
    assert both.std_error ** 2 == pytest.approx(expected, rel=1e-9)
    assert both.df_inference == min(g_f, g_y) - 1


# ---- atomic writes --------------------------------------------------------------------------------

def test_pending_timers_are_cancelled_and_never_fire() -> None:
    """The workflow's end hooks cancel the timers a process would wait out before exiting (Snakemake's
    scheduler leaves one after every round); a timer cancelled never runs its function."""
    import threading

    from fegrid.pipeline import cancel_pending_timers

    fired: list[int] = []
    timers = [threading.Timer(60.0, fired.append, args=(i,)) for i in range(2)]
    for t in timers:
        t.start()
    done = threading.Timer(0.0, fired.append, args=(9,))  # already run: not pending, not counted
    done.start()
    done.join()
    assert cancel_pending_timers() == 2
    for t in timers:
        t.join(timeout=5.0)
        assert not t.is_alive()
    assert fired == [9]
    assert cancel_pending_timers() == 0


def test_an_interrupted_write_leaves_the_old_file_and_no_fragment(tmp_path: Path) -> None:
    target = write_text(tmp_path / "ledger.csv", "old\n")

    def half(fh) -> None:
        fh.write(b"new, half written")
        raise KeyboardInterrupt  # the user stops the run in the middle of the write

    with pytest.raises(KeyboardInterrupt):
        atomic_write(target, half)
    assert target.read_text() == "old\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["ledger.csv"]


# ---- sample filters -------------------------------------------------------------------------------

SAMPLE_CASES = {
    "range": ({"range": {"year": {"min": 1940, "max": 1949}}}, lambda d: d["year"].between(1940, 1949)),
    "keep": ({"keep": {"firm": ["IBM", "Chrysler"]}}, lambda d: d["firm"].isin(["IBM", "Chrysler"])),
    "drop": ({"drop": {"firm": ["IBM"]}}, lambda d: d["firm"] != "IBM"),
    "min_periods": ({"range": {"value": {"min": 100}}, "min_periods": 15},
                    lambda d: (d["value"] >= 100) & (d.loc[d["value"] >= 100].groupby("firm")["year"]
                                                     .transform("nunique").reindex(d.index) >= 15)),
    "balanced": ({"range": {"value": {"min": 100}}, "balanced": True},
                 lambda d: (d["value"] >= 100) & (d.loc[d["value"] >= 100].groupby("firm")["year"]
                                                  .transform("nunique").reindex(d.index) == 20)),
}


@pytest.mark.parametrize("case", sorted(SAMPLE_CASES))
def test_each_sample_filter_keeps_the_rows_pandas_selects(grunfeld: pd.DataFrame, case: str) -> None:
    raw, expected = SAMPLE_CASES[case]
    sample = parse_sample(case, raw)
    kept = apply_sample(grunfeld, sample, PANEL)
    want = grunfeld[expected(grunfeld).fillna(False).astype(bool)]
    assert sorted(kept.index) == sorted(want.index) and 0 < len(kept) < len(grunfeld)
    assert sample.columns() >= set(raw.get("range", {})) | set(raw.get("keep", {})) | set(raw.get("drop", {}))


def test_sample_filters_are_canonical_and_no_ops_are_left_out() -> None:
    a = parse_sample("a", {"keep": {"firm": ["b", "a"]}, "balanced": False, "drop": {}})
    b = parse_sample("b", {"keep": {"firm": ["a", "b"]}})
    assert a.canonical() == b.canonical() == {"keep": {"firm": ["a", "b"]}}
    assert list(SAMPLE_FILTERS) == ["range", "keep", "drop", "min_periods", "balanced"]


# ---- the CLI's summary ----------------------------------------------------------------------------

def test_cli_summary_of_a_ledger(tiny_project: Path, monkeypatch, capsys) -> None:
    from fegrid.pipeline import fit_grid

    monkeypatch.chdir(tiny_project)
    plan, ledger = fit_grid("grid.yaml")
    assert main(["summary", "--ledger", str(plan.paths.ledger_csv)]) == 0
    out = capsys.readouterr().out
    base = ledger[ledger["is_baseline"]].iloc[0]
    assert f"({len(ledger)} specifications)" in out
    assert f"{base['estimate']:.4f}" in out
    assert "dimensions that move the estimate most" in out
    # clustering cannot move a point estimate: it is never listed as a dimension that moves it
    moves = out.split("dimensions that move the estimate most")[1]
    assert "clustering" not in moves
    assert np.isfinite(base["estimate"])


# ---- data formats ---------------------------------------------------------------------------------

@pytest.mark.parametrize("ending", [".csv", ".csv.gz", ".parquet", ".feather", ".dta", "semicolon.csv"])
def test_every_format_reads_only_the_columns_asked_for(grunfeld: pd.DataFrame, tmp_path: Path, ending: str) -> None:
    """statsmodels' Grunfeld data written in each format reads back the same values, and only the
    columns asked for (for Parquet, Feather and Stata through the format's own column selection)."""
    from fegrid.data import CsvOptions, file_sha256, read_table

    path = tmp_path / f"g{ending}"
    csv = CsvOptions()
    if ending == ".csv.gz":
        grunfeld.to_csv(path, index=False, compression="gzip")
    elif ending == "semicolon.csv":
        grunfeld.to_csv(path, index=False, sep=";", decimal=",")
        csv = CsvOptions(separator=";", decimal=",")
    elif ending == ".csv":
        grunfeld.to_csv(path, index=False)
    elif ending == ".parquet":
        grunfeld.to_parquet(path, index=False)
    elif ending == ".feather":
        grunfeld.to_feather(path)
    else:
        grunfeld.to_stata(path, write_index=False)
    frame = read_table(path, ["invest", "firm", "nowhere"], csv=csv)
    assert list(frame.columns) == ["invest", "firm"]
    assert frame.attrs["file_columns"] == list(grunfeld.columns)
    np.testing.assert_allclose(frame["invest"].to_numpy(), grunfeld["invest"].to_numpy())
    # the same bytes parsed from memory (as the snapshot does) give the same frame
    again = read_table(path, ["invest", "firm"], content=path.read_bytes(), csv=csv)
    pd.testing.assert_frame_equal(again, frame)
    assert len(file_sha256(path)) == 64


# ---- dated time columns ---------------------------------------------------------------------------

@pytest.mark.parametrize("frequency", ["monthly", "quarterly", "yearly"])
def test_a_dated_time_column_fits_as_its_integer_periods(grunfeld: pd.DataFrame, tmp_path: Path,
                                                         frequency: str, monkeypatch) -> None:
    """statsmodels' Grunfeld data (years 1935-1954) with the year recoded as consecutive months,
    quarters or years written as dates or labels: trends, time effects, balance (one unit's period
    removed) and a range filter written as a date give the ledger of the integer years."""
    import fegrid

    data = grunfeld.drop(index=grunfeld.index[(grunfeld["firm"] == grunfeld["firm"].iloc[0])
                                              & (grunfeld["year"] == 1940)])
    step = data["year"] - 1935
    dated = data.copy()
    if frequency == "monthly":
        dated["year"] = (pd.Timestamp("2001-11-01") + pd.to_timedelta(0, "D")).to_period("M") + step
        dated["year"] = dated["year"].astype(str)  # "2001-11", "2001-12", "2002-01", ...
        start = "2002-04"
    elif frequency == "quarterly":
        dated["year"] = [str(pd.Period("1999Q3", freq="Q") + int(s)) for s in step]  # "1999Q3", ...
        start = "2000Q4"
    else:
        dated["year"] = pd.to_datetime((1935 + step).astype(str) + "-07-01")  # a datetime column
        start = "1940-01-01"
    data.to_csv(tmp_path / "years.csv", index=False)
    dated.to_parquet(tmp_path / "dated.parquet", index=False)

    def grid(path: str, first: object, freq: str | None) -> dict:
        return {
            "run_name": "dated", "data": {"path": path, "unit": "firm", "time": "year",
                                          **({"time_frequency": freq} if freq else {})},
            "outcomes": ["invest"], "focal_regressors": ["value"],
            "absorb": {"trend": ["firm", {"trend": "firm"}], "two_way": ["firm", "year"]},
            "clustering": {"firm": {"kind": "clustered", "by": "firm"}},
            "samples": {"all": {}, "balanced": {"balanced": True}, "late": {"range": {"year": {"min": first}}}},
            "control_sets": {"named": {"capital": ["capital"]}}, "joint_inference": {"draws": 0},
        }

    monkeypatch.chdir(tmp_path)
    plain = fegrid.fit_grid(grid("years.csv", 1940, None), progress=False).ledger
    by_date = fegrid.fit_grid(grid("dated.parquet", start, frequency), progress=False).ledger
    assert len(plain) == 6 and (plain["status"] == "ok").all()
    # the same choices (a date bound is another spec id than a number bound)
    cols = ["absorb", "sample", "estimate", "std_error", "n_obs", "iterations"]
    order = ["absorb", "sample"]
    pd.testing.assert_frame_equal(by_date[cols].sort_values(order, ignore_index=True),
                                  plain[cols].sort_values(order, ignore_index=True), rtol=1e-9)
    assert plain.loc[plain["sample"] == "balanced", "n_obs"].iloc[0] == len(data) - 19  # one firm dropped
    assert plain.loc[plain["sample"] == "late", "n_obs"].iloc[0] == (data["year"] >= 1940).sum()


def test_a_time_column_that_is_not_a_date_is_named(grunfeld: pd.DataFrame, tmp_path: Path, monkeypatch) -> None:
    import fegrid

    grunfeld.assign(year=["spring"] * len(grunfeld)).to_csv(tmp_path / "g.csv", index=False)
    monkeypatch.chdir(tmp_path)
    raw = {"run_name": "bad", "data": {"path": "g.csv", "unit": "firm", "time": "year", "time_frequency": "monthly"},
           "outcomes": ["invest"], "focal_regressors": ["value"], "joint_inference": {"draws": 0}}
    with pytest.raises(fegrid.FegridError, match=r"time column 'year' is declared monthly.*'spring'"):
        fegrid.fit_grid(raw, progress=False)


def test_a_demo_file_from_an_older_generator_is_rewritten(tmp_path) -> None:
    """The demo's file (INVENTED data) is regenerated when its header is not the generator's (0.3 wrote
    no instrument or count column)."""
    from fegrid.demo import DEMO_COLUMNS, is_current_demo, make_orchards, write_demo_data

    path = tmp_path / "orchards.csv"
    assert not is_current_demo(path)
    make_orchards(n_valleys=2, per_valley=2).drop(columns=["canal_turns", "frost_damaged_trees"]).to_csv(path,
                                                                                                        index=False)
    assert not is_current_demo(path)
    write_demo_data(path)
    assert is_current_demo(path) and tuple(make_orchards(n_valleys=2, per_valley=2).columns) == DEMO_COLUMNS
