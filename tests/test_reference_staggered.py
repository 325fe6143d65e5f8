"""Staggered adoption: each estimator and diagnostic against a published identity or an independent
by-hand computation (statsmodels with explicit dummies, pandas differences of means).

Invented panels only (this module checks algebra, not data)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from fegrid.staggered import (
    StaggeredOptions,
    bacon_decomposition,
    cohorts_of,
    group_time,
    imputation,
)


def staggered_panel(n_units: int, n_periods: int, adoption: list[float | None], shares: list[float],
                    seed: int, dynamic: float = 0.3, noise: float = 1.0) -> pd.DataFrame:
    """An invented balanced panel: units split across adoption periods (None = never treated), with
    effects that grow with time since adoption and differ by cohort."""
    rng = np.random.default_rng(seed)
    groups = rng.choice(len(adoption), size=n_units, p=np.array(shares) / sum(shares))
    unit = np.repeat(np.arange(n_units), n_periods)
    period = np.tile(np.arange(1, n_periods + 1), n_units)
    adopt = np.array([np.nan if adoption[g] is None else adoption[g] for g in groups], dtype=float)[unit]
    treated = np.isfinite(adopt) & (period >= adopt)
    effect = np.where(treated, 1.0 + dynamic * (period - adopt) + 0.2 * np.nan_to_num(adopt), 0.0)
    y = rng.normal(size=n_units)[unit] + 0.1 * period ** 1.5 + effect + noise * rng.normal(size=len(unit))
    return pd.DataFrame({"unit": unit, "period": period, "adopt": adopt, "d": treated.astype(float), "y": y,
                         "x": rng.normal(size=len(unit)), "region": unit % 7, "effect": effect})


def twfe(df: pd.DataFrame, extra: str = "") -> float:
    # statsmodels OLS with explicit unit and period dummies
    return float(smf.ols(f"y ~ d {extra} + C(unit) + C(period)", data=df).fit().params["d"])


SHAPES = {
    "never-and-three-cohorts": ([3, 5, 8, None], [1, 2, 1, 2]),
    "no-never-treated": ([2, 4, 7], [1, 1, 2]),
    "treated-throughout": ([1, 4, 6, None], [1, 2, 2, 1]),
    "one-cohort-and-never": ([5, None], [1, 3]),
}


@pytest.mark.parametrize("shape", sorted(SHAPES))
def test_bacon_weighted_sum_is_the_two_way_estimate(shape):
    # Goodman-Bacon (2021), Theorem 1: sum of weight x 2x2 estimate = two-way estimate; weights sum to one
    adoption, shares = SHAPES[shape]
    df = staggered_panel(60, 9, adoption, shares, seed=len(shape))
    design = cohorts_of(df["unit"].to_numpy(), df["period"].to_numpy(), adoption=df["adopt"].to_numpy())
    table = bacon_decomposition(df["y"].to_numpy(), design)
    assert table["weight"].sum() == pytest.approx(1.0, abs=1e-12)
    assert (table["weight"] >= 0).all()
    assert float((table["weight"] * table["estimate"]).sum()) == pytest.approx(twfe(df), abs=1e-10)
    if shape != "one-cohort-and-never":
        assert (table["comparison"] == "later_vs_earlier").any()


def test_bacon_from_the_treatment_column_and_a_simple_2x2():
    df = staggered_panel(40, 6, [4, None], [1, 1], seed=3)
    design = cohorts_of(df["unit"].to_numpy(), df["period"].to_numpy(), treatment=df["d"].to_numpy())
    table = bacon_decomposition(df["y"].to_numpy(), design)
    assert list(table["comparison"]) == ["treated_vs_never"]
    # by hand with pandas: (post - pre) difference of group means
    m = df.assign(post=df["period"] >= 4, g=df["adopt"].notna()).groupby(["g", "post"])["y"].mean()
    by_hand = (m[True, True] - m[True, False]) - (m[False, True] - m[False, False])
    assert table["estimate"].iloc[0] == pytest.approx(by_hand)
    assert table["treated"].iloc[0] == "4" and table["control"].iloc[0] == "never"


def test_bacon_refuses_an_unbalanced_panel():
    df = staggered_panel(20, 5, [3, None], [1, 1], seed=4).iloc[1:]
    design = cohorts_of(df["unit"].to_numpy(), df["period"].to_numpy(), adoption=df["adopt"].to_numpy())
    with pytest.raises(ValueError, match="balanced"):
        bacon_decomposition(df["y"].to_numpy(), design)


def _imputation_by_hand(df: pd.DataFrame, controls: str) -> tuple[float, float, dict[int, float]]:
    """Borusyak, Jaravel & Spiess (2024) by hand: statsmodels OLS with explicit dummies on the untreated
    rows, counterfactuals predicted for the treated rows, averaged; Theorem 3's variance with dense
    linear algebra (implied weights -Z0 inv(Z0'Z0) Z1'w1 on a full-rank set of dummies), clustered by unit
    with G/(G-1)."""
    untreated = df[df["d"] == 0]
    treated = df[df["d"] == 1]
    fit = smf.ols(f"y ~ C(unit) + C(period){controls}", data=untreated).fit()
    tau = treated["y"] - fit.predict(treated)
    by_rel = tau.groupby(treated["period"] - treated["adopt"]).mean().to_dict()
    # dense design matrices for the variance
    def design(frame):
        # every unit's dummy and every period's but the first: full column rank, so the inverse is exact
        # (a pseudo-inverse of the rank-deficient full set depends on the platform's rounding)
        z = pd.concat([pd.get_dummies(frame["unit"].astype(str), prefix="u", dtype=float),
                       pd.get_dummies(frame["period"].astype(str), prefix="t", dtype=float, drop_first=True)], axis=1)
        if controls:
            z["x"] = frame["x"]
        return z
    z_all = design(df)
    z0 = z_all.loc[untreated.index].to_numpy()
    z1 = z_all.loc[treated.index].to_numpy()
    w1 = np.full(len(treated), 1 / len(treated))
    v0 = -z0 @ np.linalg.solve(z0.T @ z0, z1.T @ w1)
    e0 = untreated["y"] - fit.fittedvalues
    cell = tau.groupby([treated["adopt"], treated["period"] - treated["adopt"]]).transform("mean")
    e1 = tau - cell
    contrib = pd.concat([pd.Series(v0 * e0.to_numpy(), index=untreated.index),
                         pd.Series(w1 * e1.to_numpy(), index=treated.index)])
    sums = contrib.groupby(df["unit"]).sum()
    g = len(sums)
    return float(tau.mean()), float(np.sqrt((sums ** 2).sum() * g / (g - 1))), by_rel


@pytest.mark.parametrize("controls", ["", " + x"])
def test_imputation_matches_a_by_hand_fit_on_untreated_rows(controls):
    df = staggered_panel(30, 7, [3, 5, None], [1, 1, 1], seed=11)
    design = cohorts_of(df["unit"].to_numpy(), df["period"].to_numpy(), adoption=df["adopt"].to_numpy())
    x = df[["x"]].to_numpy() if controls else np.zeros((len(df), 0))
    got = imputation(df["y"].to_numpy(), design, [df["unit"].to_numpy(), df["period"].to_numpy()], x,
                     df["unit"].to_numpy(), StaggeredOptions(control="not_yet_treated"))
    est, se, by_rel = _imputation_by_hand(df, controls)
    assert got.names[0] == "overall"
    assert got.estimates[0] == pytest.approx(est, abs=1e-9)
    assert np.sqrt(got.covariance[0, 0]) == pytest.approx(se, rel=1e-7)
    for k in range(0, 5):
        assert got.estimates[got.names.index(f"rel=+{k}")] == pytest.approx(by_rel[k], abs=1e-9)


def test_group_time_effects_are_differences_of_means():
    # Callaway & Sant'Anna (2021) without covariates: each ATT(g, t) is a 2x2 difference of mean changes
    # from the base period g - 1, computed here with pandas
    df = staggered_panel(80, 7, [3, 5, None], [1, 1, 2], seed=5)
    design = cohorts_of(df["unit"].to_numpy(), df["period"].to_numpy(), adoption=df["adopt"].to_numpy())
    wide = df.pivot(index="unit", columns="period", values="y")
    adopt = df.groupby("unit")["adopt"].first()
    for control in ("never_treated", "not_yet_treated"):
        opts = StaggeredOptions(first=-3, last=3, control=control, draws=200)
        agg, table = group_time(df["y"].to_numpy(), design, df["unit"].to_numpy(), opts, seed=1, level=0.95)
        for row in table.itertuples():
            g, t = int(row.cohort), int(row.period)
            dy = wide[t] - wide[g - 1]
            not_yet = (adopt.isna() | (adopt > max(t, g - 1))) & (adopt != g)
            ctrl = adopt.isna() if control == "never_treated" else not_yet
            expected = dy[adopt == g].mean() - dy[ctrl].mean()
            assert row.estimate == pytest.approx(expected, abs=1e-10)
            if control == "never_treated":
                # influence-function variance = within-group sums of squares / n^2, with N/(N-1)
                a, b = dy[adopt == g], dy[ctrl]
                var = (((a - a.mean()) ** 2).sum() / len(a) ** 2 + ((b - b.mean()) ** 2).sum() / len(b) ** 2)
                assert row.std_error == pytest.approx(np.sqrt(var * 80 / 79), rel=1e-9)
        # overall: post cells weighted by cohort size
        post = table[table["relative"] >= 0]
        size = adopt.value_counts()
        w = post["cohort"].map(size)
        assert agg.estimates[0] == pytest.approx(float((w * post["estimate"]).sum() / w.sum()), abs=1e-12)
        assert agg.uniform_critical > 1.96


def test_group_time_weights_influence_by_brute_force():
    # the aggregated estimate's influence function (with estimated weights) against a numerical
    # derivative: perturbing one unit's weight in every mean and share moves the estimate by psi_i
    df = staggered_panel(50, 6, [3, 4, None], [1, 2, 2], seed=8)
    design = cohorts_of(df["unit"].to_numpy(), df["period"].to_numpy(), adoption=df["adopt"].to_numpy())
    opts = StaggeredOptions(control="never_treated", draws=0)
    agg, _ = group_time(df["y"].to_numpy(), design, df["unit"].to_numpy(), opts, seed=1, level=0.95)
    wide = df.pivot(index="unit", columns="period", values="y")
    adopt = df.groupby("unit")["adopt"].first()

    def overall(weights: pd.Series) -> float:
        total, num = 0.0, 0.0
        for g in (3, 4):
            mine, ctrl = adopt == g, adopt.isna()
            size = weights[mine].sum()
            for t in range(g, 7):
                dy = wide[t] - wide[g - 1]
                att = np.average(dy[mine], weights=weights[mine]) - np.average(dy[ctrl], weights=weights[ctrl])
                num += size * att
                total += size
        return num / total

    ones = pd.Series(1.0, index=wide.index)
    base = overall(ones)
    assert agg.estimates[0] == pytest.approx(base, abs=1e-12)
    eps = 1e-6
    psi = np.array([(overall(ones + eps * (ones.index == i)) - base) / eps for i in wide.index])
    var = (psi ** 2).sum() * 50 / 49
    assert np.sqrt(agg.covariance[0, 0]) == pytest.approx(np.sqrt(var), rel=1e-4)


# ---- through the engine (fit_block), against statsmodels with explicit dummies ------------------------------

from fegrid.absorb import parse_absorb  # noqa: E402
from fegrid.estimate import BlockSettings, Inference, SpecRequest, fit_block  # noqa: E402
from fegrid.estimators import parse_estimator  # noqa: E402


def engine(df: pd.DataFrame, method: str, *, controls: tuple[str, ...] = (), kind: str = "hc1",
           absorb: tuple[str, ...] = ("unit", "period"), adoption: str | None = "adopt", **options):
    settings = BlockSettings(absorb=parse_absorb(list(absorb)), unit="unit", time="period", treatment="d",
                             adoption=adoption)
    est = parse_estimator("e", {"method": method, **options})
    by = (("unit",),) if kind == "clustered" else ()
    spec = SpecRequest("s", "y", "d", controls, Inference(kind, by), est)
    fit = fit_block(df, settings, [spec])
    return fit.results[0], fit.coefficients.get("s")


def test_event_study_matches_statsmodels_with_relative_period_dummies():
    df = staggered_panel(40, 9, [3, 5, 7, None], [1, 1, 1, 1], seed=21)
    result, coefs = engine(df, "event_study", controls=("x",), window=[-3, 2], reference=-1)
    rel = (df["period"] - df["adopt"]).clip(-3, 2)
    names = []
    for k in (-3, -2, 0, 1, 2):
        name = f"r{k + 10}"
        df[name] = ((rel == k) & df["adopt"].notna()).astype(float)
        names.append(name)
    # statsmodels OLS with explicit unit and period dummies, HC1
    fit = smf.ols("y ~ " + " + ".join(names) + " + x + C(unit) + C(period)", data=df).fit(cov_type="HC1")
    table = dict(zip(coefs.terms, coefs.estimates))
    for k, name in zip((-3, -2, 0, 1, 2), names):
        assert table[f"rel={k:+d}"] == pytest.approx(fit.params[name], abs=1e-8)
    post = [n for k, n in zip((-3, -2, 0, 1, 2), names) if k >= 0]
    a = np.array([1 / 3 if n in post else 0.0 for n in fit.params.index])
    assert result.estimate == pytest.approx(float(a @ fit.params), abs=1e-8)
    assert result.std_error == pytest.approx(float(np.sqrt(a @ fit.cov_params().to_numpy() @ a)), rel=1e-6)
    pre = fit.f_test(" , ".join(f"{n} = 0" for n in names[:2]))
    assert result.pretrend_p_value == pytest.approx(float(pre.pvalue), rel=1e-6)
    assert result.cohorts == 3 and result.never_treated_units > 0


@pytest.mark.parametrize("control", ["never_treated", "last_adopters"])
def test_interaction_weighted_matches_statsmodels_with_cohort_period_dummies(control):
    df = staggered_panel(45, 8, [3, 5, 6, None], [1, 1, 1, 1], seed=22)
    result, coefs = engine(df, "interaction_weighted", window=[-2, 2], controls_from=control)
    data = df.copy()
    if control == "last_adopters":
        data = data[data["period"] < 6]
    treated_cohorts = [3, 5] if control == "last_adopters" else [3, 5, 6]
    rel = data["period"] - data["adopt"]
    cells = []
    for g in treated_cohorts:
        for k in sorted(rel[data["adopt"] == g].unique()):
            if k == -1:
                continue
            name = f"c{g}_{int(k) + 10}"
            data[name] = ((data["adopt"] == g) & (rel == k)).astype(float)
            cells.append((g, int(k), name))
    fit = smf.ols("y ~ " + " + ".join(c[2] for c in cells) + " + C(unit) + C(period)", data=data).fit(cov_type="HC1")
    table = dict(zip(coefs.terms, coefs.estimates))
    for g, k, name in cells:
        assert table[f"cohort={g},rel={k:+d}"] == pytest.approx(fit.params[name], abs=1e-8)
    # Sun & Abraham (2021) weights by hand: cohort shares of the observations at each relative period
    count = {name: data[name].sum() for _, _, name in cells}
    for k in (-2, 0, 1, 2):
        members = [name for g, kk, name in cells if kk == k]
        w = np.array([count[n] for n in members]) / sum(count[n] for n in members)
        assert table[f"rel={k:+d}"] == pytest.approx(float(w @ fit.params[members]), abs=1e-8)
    post = [name for g, k, name in cells if k >= 0]
    a = pd.Series(0.0, index=fit.params.index)
    a[post] = [count[n] for n in post]
    a /= a.sum()
    assert result.estimate == pytest.approx(float(a @ fit.params), abs=1e-8)
    # Sun & Abraham (2021) count the estimated cohort shares too: by hand, each unit's influence through the
    # shares is the sum over its post-period observations of (cell coefficient - overall) / observations
    theta = float(a @ fit.params)
    share = pd.Series(0.0, index=data.index)
    for _cohort, k, name in cells:
        if k >= 0:
            share[data[name] == 1] = (fit.params[name] - theta) / sum(count[n] for n in post)
    by_unit = share.groupby(data["unit"]).sum()
    g = len(by_unit)
    variance = float(a @ fit.cov_params() @ a) + float((by_unit ** 2).sum()) * g / (g - 1)
    assert result.std_error == pytest.approx(np.sqrt(variance), rel=1e-6)


def test_two_way_fits_of_the_treatment_carry_the_adoption_diagnostics():
    # de Chaisemartin & D'Haultfoeuille (2020), Theorem 1: with y = unit + period effects + D * Delta
    # (no noise), the two-way estimate equals sum over treated observations of w * Delta, with w the
    # residual of D on the dummies over its sum on treated rows (by hand with statsmodels)
    df = staggered_panel(30, 8, [2, 4, 7, None], [2, 1, 1, 1], seed=23, noise=0.0)
    result, _ = engine(df, "least_squares", kind="clustered")
    resid = smf.ols("d ~ C(unit) + C(period)", data=df).fit().resid
    treated = df["d"] == 1
    w = resid[treated] / resid[treated].sum()
    assert result.estimate == pytest.approx(float((w * df.loc[treated, "effect"]).sum()), abs=1e-9)
    assert result.negative_weights == int((w < 0).sum()) > 0
    assert result.negative_weight_sum == pytest.approx(float(w[w < 0].sum()), abs=1e-10)
    spread = np.sqrt(((len(w) * w - 1) ** 2).mean())
    assert result.sign_flip_sd == pytest.approx(abs(result.estimate) / spread, rel=1e-9)
    # Goodman-Bacon (2021): the decomposition of this very fit sums to its estimate
    table = pd.read_json(__import__("io").StringIO(result.decomposition))
    assert float((table["weight"] * table["estimate"]).sum()) == pytest.approx(result.estimate, abs=1e-9)
    assert result.already_treated_weight == pytest.approx(
        float(table.loc[table["comparison"] == "later_vs_earlier", "weight"].sum()))
    assert result.cohorts == 3
    # with a control, the weights stay and the decomposition (no-controls theorem) is left out
    with_x, _ = engine(df, "least_squares", controls=("x",))
    assert with_x.decomposition == "" and with_x.negative_weights >= 0


def test_robust_estimators_through_the_engine_agree_with_the_functions():
    df = staggered_panel(40, 8, [3, 5, None], [1, 1, 1], seed=24)
    imp, imp_coefs = engine(df, "imputation", kind="clustered")
    est, se, _ = _imputation_by_hand(df, "")
    assert imp.status == "ok" and imp.estimate == pytest.approx(est, abs=1e-9)
    assert imp.std_error == pytest.approx(se, rel=1e-7)
    assert imp_coefs.terms[0] == "d" and "rel=+0" in imp_coefs.terms
    gt, gt_coefs = engine(df, "group_time", kind="clustered", window=[-3, 3])
    assert gt.status == "ok" and np.isfinite(gt.pretrend_p_value) and gt.uniform_critical > 1.9
    assert any(t.startswith("cohort=") for t in gt_coefs.terms)
    # without data.adoption the cohorts come from the treatment column: the same numbers
    gt2, _ = engine(df, "group_time", kind="clustered", window=[-3, 3], adoption=None)
    assert gt2.estimate == pytest.approx(gt.estimate, abs=1e-12)
    with_x, with_x_coefs = engine(df, "group_time", controls=("x",), kind="clustered", window=[-3, 3])
    assert with_x.status == "ok" and with_x.estimate != pytest.approx(gt.estimate, abs=1e-6)


def test_group_time_with_covariates_by_hand():
    # Callaway & Sant'Anna (2021) with covariates, outcome-regression form (Sant'Anna & Zhao 2020): for each
    # ATT(g, t), statsmodels OLS of the change on the base-period covariate among the controls, predicted
    # for the cohort; the overall effect's standard error against a numerical derivative of the whole
    # estimator in each unit's weight (weighted least squares and weighted means)
    df = staggered_panel(60, 6, [3, 4, None], [1, 2, 2], seed=51)
    design = cohorts_of(df["unit"].to_numpy(), df["period"].to_numpy(), adoption=df["adopt"].to_numpy())
    opts = StaggeredOptions(control="not_yet_treated", draws=0)
    agg, table = group_time(df["y"].to_numpy(), design, df["unit"].to_numpy(), opts, seed=1, level=0.95,
                            covariates=df[["x"]].to_numpy())
    wide = df.pivot(index="unit", columns="period", values="y")
    xw = df.pivot(index="unit", columns="period", values="x")
    adopt = df.groupby("unit")["adopt"].first()

    def att(g: int, t: int, weights: pd.Series) -> float:
        ctrl = (adopt.isna() | (adopt > max(t, g - 1))) & (adopt != g)
        frame = pd.DataFrame({"dy": wide[t] - wide[g - 1], "x": xw[g - 1], "w": weights})
        fit = smf.wls("dy ~ x", data=frame[ctrl], weights=frame.loc[ctrl, "w"]).fit()
        mine = adopt == g
        return float(np.average(frame.loc[mine, "dy"] - fit.predict(frame[mine]), weights=weights[mine]))

    ones = pd.Series(1.0, index=wide.index)
    for row in table.itertuples():
        assert row.estimate == pytest.approx(att(int(row.cohort), int(row.period), ones), abs=1e-10)

    def overall(weights: pd.Series) -> float:
        num = total = 0.0
        for g in (3, 4):
            size = weights[adopt == g].sum()
            for t in range(g, 7):
                num += size * att(g, t, weights)
                total += size
        return num / total

    base = overall(ones)
    assert agg.estimates[0] == pytest.approx(base, abs=1e-10)
    eps = 1e-6
    psi = np.array([(overall(ones + eps * (ones.index == i)) - base) / eps for i in wide.index])
    assert np.sqrt(agg.covariance[0, 0]) == pytest.approx(np.sqrt((psi ** 2).sum() * 60 / 59), rel=1e-4)


# ---- an open dataset: linearmodels' jobtraining (Holzer et al. 1993, as in Wooldridge's textbook) ----------
# Firms receive a training grant in 1988 or 1989 or never; "trained" is on from a firm's grant year. Firms
# with a missing log training hours are dropped, so the panel is balanced (124 firms, 1987-1989).


@pytest.fixture(scope="module")
def jobtraining() -> pd.DataFrame:
    from linearmodels.datasets import jobtraining as source

    d = source.load().sort_values(["fcode", "year"]).reset_index(drop=True)
    d["trained"] = d.groupby("fcode")["grant"].cummax().astype(float)
    d = d[d.groupby("fcode")["lhrsemp"].transform(lambda s: s.notna().all())].copy()
    first = d[d["trained"] == 1].groupby("fcode")["year"].min()
    d["grant_year"] = d["fcode"].map(first).astype(float)
    return d.rename(columns={"fcode": "unit", "year": "period", "trained": "d", "lhrsemp": "y",
                             "grant_year": "adopt", "lemploy": "x"})[["unit", "period", "d", "y", "adopt", "x"]]


def test_jobtraining_decomposition_and_group_time_effects(jobtraining):
    df = jobtraining
    design = cohorts_of(df["unit"].to_numpy(), df["period"].to_numpy(), treatment=df["d"].to_numpy())
    table = bacon_decomposition(df["y"].to_numpy(), design)
    # Goodman-Bacon (2021), Theorem 1 against statsmodels OLS with firm and year dummies
    assert float((table["weight"] * table["estimate"]).sum()) == pytest.approx(twfe(df), abs=1e-10)
    assert sorted(table["comparison"]) == ["earlier_vs_later", "later_vs_earlier", "treated_vs_never",
                                           "treated_vs_never"]
    got, cells = group_time(df["y"].to_numpy(), design, df["unit"].to_numpy(),
                            StaggeredOptions(first=-1, last=1, reference=-1, draws=0), seed=1, level=0.95)
    wide = df.pivot(index="unit", columns="period", values="y")
    adopt = df.groupby("unit")["adopt"].first()
    for row in cells.itertuples():  # Callaway & Sant'Anna (2021): differences of mean changes, by pandas
        g, t = int(row.cohort), int(row.period)
        dy = wide[t] - wide[g - 1]
        assert row.estimate == pytest.approx(dy[adopt == g].mean() - dy[adopt.isna()].mean(), abs=1e-12)


def test_jobtraining_imputation_and_interaction_weighted(jobtraining):
    df = jobtraining.copy()
    result, coefs = engine(df, "imputation", kind="clustered", adoption=None)
    est, se, _ = _imputation_by_hand(df, "")  # statsmodels on untreated rows, averaged
    assert result.estimate == pytest.approx(est, abs=1e-9)
    assert result.std_error == pytest.approx(se, rel=1e-7)
    iw, iw_coefs = engine(df, "interaction_weighted", window=[-1, 1], adoption=None)
    rel = df["period"] - df["adopt"]
    cells = []
    for g in (1988, 1989):
        for k in sorted(rel[df["adopt"] == g].unique()):
            if k != -1:
                name = f"c{g}_{int(k) + 10}"
                df[name] = ((df["adopt"] == g) & (rel == k)).astype(float)
                cells.append((g, int(k), name))
    fit = smf.ols("y ~ " + " + ".join(c[2] for c in cells) + " + C(unit) + C(period)", data=df).fit()
    table = dict(zip(iw_coefs.terms, iw_coefs.estimates))
    for g, k, name in cells:
        assert table[f"cohort={g},rel={k:+d}"] == pytest.approx(fit.params[name], abs=1e-9)


def test_imputation_pretrend_test_by_hand():
    # Borusyak, Jaravel & Spiess (2024), test of parallel trends: on untreated rows, the outcome on unit and
    # period dummies, x and indicators of 1..3 periods before adoption; joint Wald test of the indicators
    # (F with G - 1 df), clustered by unit with G/(G-1); by hand with dense dummies (numpy) and statsmodels
    from scipy import stats

    df = staggered_panel(40, 8, [3, 5, 7, None], [1, 1, 1, 1], seed=31)
    design = cohorts_of(df["unit"].to_numpy(), df["period"].to_numpy(), adoption=df["adopt"].to_numpy())
    got = imputation(df["y"].to_numpy(), design, [df["unit"].to_numpy(), df["period"].to_numpy()],
                     df[["x"]].to_numpy(), df["unit"].to_numpy(), StaggeredOptions(first=-3, last=2,
                                                                                   control="not_yet_treated"))
    untreated = df[df["d"] == 0].copy()
    rel = untreated["period"] - untreated["adopt"]
    names = []
    for k in (-3, -2, -1):
        untreated[f"pre{-k}"] = (rel == k).astype(float)
        names.append(f"pre{-k}")
    fit = smf.ols("y ~ " + " + ".join(names) + " + x + C(unit) + C(period)", data=untreated).fit()
    x = fit.model.exog
    bread = np.linalg.inv(x.T @ x)
    scores = pd.DataFrame(x * fit.resid.to_numpy()[:, None]).groupby(untreated["unit"].to_numpy()).sum().to_numpy()
    g = len(scores)
    cov = bread @ (scores.T @ scores) @ bread * g / (g - 1)
    idx = [list(fit.params.index).index(n) for n in names]
    b = fit.params.to_numpy()[idx]
    stat = float(b @ np.linalg.solve(cov[np.ix_(idx, idx)], b)) / 3
    assert got.pretrend_p_value == pytest.approx(float(stats.f.sf(stat, 3, g - 1)), rel=1e-6)


def test_group_time_refuses_clusters_that_vary_within_units():
    df = staggered_panel(30, 6, [3, None], [1, 1], seed=41)
    df["season_block"] = df["period"] // 2
    settings = BlockSettings(absorb=parse_absorb(["unit", "period"]), unit="unit", time="period", treatment="d")
    spec = SpecRequest("s", "y", "d", (), Inference("clustered", (("season_block",),)),
                       parse_estimator("e", {"method": "group_time", "uniform_band_draws": 0}))
    result = fit_block(df, settings, [spec]).results[0]
    assert result.status == "not_identified" and "constant within units" in result.message


@pytest.mark.parametrize("kind", ["homoskedastic", "hc1", "clustered", "two_way_clustered"])
def test_event_study_standard_error_is_the_combination_of_its_indicators(jobtraining, kind):
    """The reported event-study estimate is the average of the post-period indicators' coefficients, so
    its variance is ``a'Va`` with ``V`` the indicators' covariance (the variance of a linear
    combination) under every covariance kind; linearmodels' jobtraining panel. Before, the
    homoskedastic and two-way kinds gave the first indicator's variance (they read element [0, 0] of
    the coefficients' matrix): 0.25 against 0.24 under two-way clustering on the invented demo data."""
    settings = BlockSettings(absorb=parse_absorb(["unit", "period"]), unit="unit", time="period", treatment="d")
    by = {"homoskedastic": (), "hc1": (), "clustered": (("unit",),),
          "two_way_clustered": (("unit",), ("period",))}[kind]
    est = parse_estimator("e", {"method": "event_study", "window": [-2, 1], "reference": -1})
    fit = fit_block(jobtraining, settings, [SpecRequest("s", "y", "d", (), Inference(kind, by), est)])
    result, coefs = fit.results[0], fit.coefficients["s"]
    rows = [j for j, t in enumerate(coefs.terms) if t.startswith("rel=")]
    a = np.array([1.0 if coefs.terms[j].startswith("rel=+") else 0.0 for j in rows])
    a /= a.sum()
    v = coefs.covariance[np.ix_(rows, rows)]
    assert result.estimate == pytest.approx(float(a @ coefs.estimates[rows]), abs=1e-12)
    assert result.std_error == pytest.approx(float(np.sqrt(a @ v @ a)), rel=1e-10)


@pytest.mark.parametrize("controls", [[], ["hours", "married"]])
def test_direct_solve_of_the_untreated_fit_equals_explicit_dummies(wage_panel, controls):
    """Source: numpy least squares on explicit worker and year dummies (linearmodels' wage_panel, made
    unbalanced by dropping worker-years; by SVD: ``Z g`` is the least-norm solution of ``Z'u = rhs``). The
    imputation estimator's systems ``Z'Z g = rhs`` (Z: the two effects' dummies and the controls) are
    solved directly (large effect eliminated, a small dense system left); ``Z g`` must equal the
    dummies' solution, for a right-hand side ``Z'y`` (a projection)
    and for the treated rows' level sums (the weights on untreated rows), and the conjugate-gradient
    path's, which stays for three effects or many small levels."""
    from fegrid.staggered import _group_cg, _group_solve, _sums

    df = wage_panel.iloc[np.random.default_rng(8).permutation(len(wage_panel))[: len(wage_panel) - 400]]
    unit = pd.factorize(df["nr"], sort=True)[0]
    year = pd.factorize(df["year"], sort=True)[0]
    codes, sizes = [unit, year], [int(unit.max()) + 1, int(year.max()) + 1]
    x = df[controls].to_numpy(dtype=float) if controls else np.zeros((len(df), 0))
    z = np.hstack([np.eye(sizes[0])[unit], np.eye(sizes[1])[year], x])
    y = df[["lwage"]].to_numpy(dtype=float)
    treated = np.random.default_rng(9).random(len(df)) < 0.2  # some rows play the treated ones
    w1 = np.column_stack([np.full(treated.sum(), 1 / treated.sum()), np.random.default_rng(10).random(treated.sum())])
    rows0 = ~treated
    for rhs_of, rows in (("projection", slice(None)), ("treated sums", rows0)):
        c = [k[rows] for k in codes]
        xr, zr = x[rows], z[rows]
        if rhs_of == "projection":
            rhs = np.vstack([_sums(c, sizes, y[rows]), xr.T @ y[rows]])
        else:
            rhs = np.vstack([_sums([k[treated] for k in codes], sizes, w1), x[treated].T @ w1])
        # columns scaled to unit norm: the same span, a better conditioned SVD
        d = np.maximum(np.linalg.norm(zr, axis=0), 1e-300)
        exact = np.linalg.lstsq((zr / d).T, rhs / d[:, None], rcond=None)[0]  # u in Z's span with Z'u = rhs: Z g
        direct = _group_solve(c, sizes, xr, rhs)
        iterated = _group_cg(c, sizes, xr, rhs)
        scale = np.abs(exact).max()
        assert np.abs(direct - exact).max() <= 1e-10 * scale, rhs_of
        assert np.abs(direct - iterated).max() <= 1e-9 * scale, rhs_of
