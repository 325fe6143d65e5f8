"""Two-stage least squares and Poisson PML against outside references.

Sources, named beside each check:
* linearmodels ``IV2SLS`` (debiased=True) with explicit dummy columns for the absorbed effects, on
  linearmodels' wage_panel (Vella & Verbeek 1998);
* statsmodels ``GLM(family=Poisson())`` with explicit dummy columns, on linearmodels' jobtraining
  (Holzer et al. 1993), whose scrap rate is a non-negative outcome with zeros;
* Wooldridge, Introductory Econometrics, Example 15.10 (jobtraining, 1987-1988, first-differenced
  IV), values from memory;
* statsmodels OLS regressions and F tests for the Anderson-Rubin set, computed here point by point;
* the Cragg & Donald (1993) statistic computed by hand, which the Kleibergen & Paap (2006) rk
  statistic equals under homoskedastic errors (their paper, section 3).

Mapping of conventions (fegrid.covariance): linearmodels and statsmodels count every dummy column
in the df of their small-sample factors; fegrid leaves out the effects nested in the cluster
variable (Cameron & Miller 2015), so where they are nested the test applies the exact factor.
statsmodels' GLM applies no ``N / (N - K)`` factor to heteroskedasticity-robust errors (its HC1
equals its HC0 for GLMs), so fegrid's hc1 is compared with HC0 times ``sqrt(N / (N - K))``.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from fegrid.absorb import parse_absorb
from fegrid.estimate import BlockSettings, Inference, SpecRequest, fit_block, fit_one
from fegrid.estimators import Estimator, kleibergen_paap_rk

sm = pytest.importorskip("statsmodels.api")
IV2SLS = pytest.importorskip("linearmodels.iv").IV2SLS


@pytest.fixture(scope="module")
def wages(wage_panel: pd.DataFrame) -> pd.DataFrame:
    d = wage_panel
    return d[d["nr"].isin(sorted(d["nr"].unique())[:150])].reset_index(drop=True)


def _dummies(frame: pd.DataFrame, columns: list[str]) -> pd.DataFrame:
    const = pd.Series(1.0, index=frame.index, name="const")
    return pd.concat([const, pd.get_dummies(frame[columns].astype(str), drop_first=True).astype(float)], axis=1)


TWO_SLS = Estimator("two_stage_least_squares", ("union", "married"))


@pytest.mark.parametrize("kind,by,lm_kind,nested", [
    ("homoskedastic", (), "unadjusted", False),
    ("hc1", (), "robust", False),
    ("clustered", ("nr",), "clustered", True),  # worker effects nested in worker clusters
    ("clustered", ("occupation",), "clustered", False),  # not nested
    ("two_way_clustered", ("nr", "year"), "clustered", False),  # neither effect nested in both
])
def test_two_stage_matches_linearmodels_iv2sls_with_dummies(wages, kind, by, lm_kind, nested) -> None:
    """Source: linearmodels IV2SLS(debiased=True) with worker and year dummy columns; the first-stage
    coefficients from linearmodels IV2SLS run as OLS (no endogenous regressors)."""
    d = wages
    r = fit_one(d, "lwage", "hours", controls=["expersq"], absorb=parse_absorb(["nr", "year"]),
                inference=Inference(kind, tuple((b,) for b in by)), estimator=TWO_SLS, unit="nr", time="year")
    assert r.status == "ok", r.message
    exog = pd.concat([d[["expersq"]], _dummies(d, ["nr", "year"])], axis=1)
    kwargs = {"cov_type": lm_kind, "debiased": True}
    if lm_kind == "clustered":
        kwargs["clusters"] = d[list(by)]
    m = IV2SLS(d["lwage"], exog, d[["hours"]], d[["union", "married"]]).fit(**kwargs)
    assert r.estimate == pytest.approx(m.params["hours"], rel=1e-8)
    factor = 1.0
    if nested:  # linearmodels counts the worker dummies in (N - 1) / (N - K); fegrid does not
        n, k_lm = r.n_obs, exog.shape[1] + 1
        k_ours = 2 + r.absorbed_df - d["nr"].nunique()
        factor = math.sqrt((n - k_ours) / (n - k_lm))
    assert r.std_error * factor == pytest.approx(m.std_errors["hours"], rel=1e-7)
    # first-stage diagnostics: partial R-squared; with one endogenous regressor the Kleibergen-Paap F
    # is the first stage's Wald statistic over the number of instruments (linearmodels' f.stat is
    # that F for unadjusted errors and the chi-squared Wald statistic otherwise)
    diag = m.first_stage.diagnostics.loc["hours"]
    assert r.partial_r2 == pytest.approx(diag["partial.rsquared"], rel=1e-7)
    if kind in ("homoskedastic", "hc1"):
        wald = diag["f.stat"] if kind == "homoskedastic" else diag["f.stat"] / 2
        assert r.kp_f == pytest.approx(wald, rel=1e-7)
    if kind == "homoskedastic":  # Montiel Olea & Pflueger (2013): effective F = Staiger-Stock F under homoskedasticity
        assert r.effective_f == pytest.approx(diag["f.stat"], rel=1e-7)
    first = IV2SLS(d["hours"], pd.concat([d[["union", "married", "expersq"]], _dummies(d, ["nr", "year"])], axis=1),
                   None, None).fit()
    shown = dict(part.split("=") for part in r.first_stage.split("; "))
    assert float(shown["union"]) == pytest.approx(first.params["union"], rel=1e-5)


def test_weighted_two_stage_matches_linearmodels(wages) -> None:
    """Source: linearmodels IV2SLS(weights=..., debiased=True) with dummy columns."""
    d = wages.assign(w=1.0 + (wages["nr"] % 5))
    r = fit_one(d, "lwage", "hours", absorb=parse_absorb(["nr", "year"]), inference=Inference("hc1"),
                estimator=TWO_SLS, weights="w", unit="nr", time="year")
    m = IV2SLS(d["lwage"], _dummies(d, ["nr", "year"]), d[["hours"]], d[["union", "married"]],
               weights=d["w"]).fit(cov_type="robust", debiased=True)
    assert r.estimate == pytest.approx(m.params["hours"], rel=1e-8)
    assert r.std_error == pytest.approx(m.std_errors["hours"], rel=1e-7)


def test_wooldridge_example_15_10_job_training_and_scrap_rates(jobtraining) -> None:
    """Source: Wooldridge, Introductory Econometrics, Example 15.10 (from memory): first-differenced
    IV of log scrap on hours of training per employee, instrumented by the grant, 1987-1988, 45
    firms: -.014 (.008). With two periods, firm and year effects give the first-differenced
    estimate and its homoskedastic SE exactly (same df: 90 - 45 - 1 - 1 = 43 = 45 - 2)."""
    d = jobtraining.reset_index() if "fcode" not in jobtraining.columns else jobtraining
    s = d[d["year"].isin([1987, 1988])].dropna(subset=["lscrap", "hrsemp", "grant"])
    s = s[s.groupby("fcode")["year"].transform("size") == 2]
    r = fit_one(s, "lscrap", "hrsemp", absorb=parse_absorb(["fcode", "year"]), inference=Inference("homoskedastic"),
                estimator=Estimator("two_stage_least_squares", ("grant",)), unit="fcode", time="year")
    assert r.n_obs == 90
    assert round(r.estimate, 3) == -0.014
    assert round(r.std_error, 3) == 0.008
    # and exactly the first-differenced IV computed by hand (statsmodels: the two OLS stages' algebra)
    w = s.pivot(index="fcode", columns="year", values=["hrsemp", "grant", "lscrap"])
    dx, dz, dy = (w[c][1988] - w[c][1987] for c in ("hrsemp", "grant", "lscrap"))
    z = sm.add_constant(dz.to_numpy())
    x = sm.add_constant(dx.to_numpy())
    xhat = z @ np.linalg.lstsq(z, x, rcond=None)[0]
    beta = np.linalg.lstsq(xhat, dy.to_numpy(), rcond=None)[0]
    assert r.estimate == pytest.approx(beta[1], rel=1e-9)
    assert float(r.first_stage.split("=")[1]) == pytest.approx(sm.OLS(dx.to_numpy(), z).fit().params[1], rel=1e-5)


def test_anderson_rubin_set_endpoints_are_where_statsmodels_f_test_crosses(wages) -> None:
    """Source: statsmodels OLS of (y - b x) on the instrument and dummy columns with its F test of the
    instrument: at each end of fegrid's Anderson-Rubin set the F test's p-value is 1 - level, and
    the test of b = 0 is fegrid's ar_p_value."""
    d = wages
    r = fit_one(d, "lwage", "hours", absorb=parse_absorb(["nr", "year"]), inference=Inference("homoskedastic"),
                estimator=Estimator("two_stage_least_squares", ("married",)), unit="nr", time="year")
    exog = pd.concat([d[["married"]], _dummies(d, ["nr", "year"])], axis=1)

    def p_at(b: float) -> float:
        fit = sm.OLS(d["lwage"] - b * d["hours"], exog).fit()
        return float(fit.f_test("married = 0").pvalue)

    assert r.ar_p_value == pytest.approx(p_at(0.0), rel=1e-6)
    if math.isfinite(r.ar_ci_low) and math.isfinite(r.ar_ci_high):
        assert p_at(r.ar_ci_low) == pytest.approx(0.05, abs=1e-6)
        assert p_at(r.ar_ci_high) == pytest.approx(0.05, abs=1e-6)
    else:  # an unbounded set: its finite ends still sit where the test crosses the level
        for end in (r.ar_ci_low, r.ar_ci_high):
            if math.isfinite(end):
                assert p_at(end) == pytest.approx(0.05, abs=1e-6)
        assert "inf" in r.ar_set or r.ar_set == "the whole line"


def test_anderson_rubin_with_a_strong_instrument_is_a_bounded_interval_around_2sls(jobtraining) -> None:
    """Source: statsmodels OLS F tests as above, on Wooldridge's Example 15.10 sample (a strong grant)."""
    d = jobtraining.reset_index() if "fcode" not in jobtraining.columns else jobtraining
    s = d[d["year"].isin([1987, 1988])].dropna(subset=["lscrap", "hrsemp", "grant"])
    s = s[s.groupby("fcode")["year"].transform("size") == 2].reset_index(drop=True)
    r = fit_one(s, "lscrap", "hrsemp", absorb=parse_absorb(["fcode", "year"]), inference=Inference("hc1"),
                estimator=Estimator("two_stage_least_squares", ("grant",)), unit="fcode", time="year")
    assert r.ar_set.startswith("[") and r.ar_ci_low < r.estimate < r.ar_ci_high
    exog = pd.concat([s[["grant"]], _dummies(s, ["fcode", "year"])], axis=1)
    for end in (r.ar_ci_low, r.ar_ci_high):
        fit = sm.OLS(s["lscrap"] - end * s["hrsemp"], exog).fit(cov_type="HC1")
        assert float(fit.f_test("grant = 0").pvalue) == pytest.approx(0.05, abs=2e-3)  # HC1 F with df N - K


def test_kleibergen_paap_equals_cragg_donald_under_homoskedasticity(wages) -> None:
    """Source: Kleibergen & Paap (2006), section 3: with homoskedastic errors the rk statistic is the
    Cragg & Donald (1993) statistic, the smallest eigenvalue of S^{-1/2} Y'P_Z Y S^{-1/2}, computed
    here by hand with numpy."""
    rng = np.random.default_rng(5)
    n, k, p = 400, 3, 2
    z = rng.normal(size=(n, k))
    y = z @ rng.normal(size=(k, p)) * 0.3 + rng.normal(size=(n, p))
    pi = np.linalg.lstsq(z, y, rcond=None)[0]
    v = y - z @ pi
    dof = n - k
    sigma = v.T @ v / dof
    v_pi = np.kron(sigma, np.linalg.inv(z.T @ z))
    rk = kleibergen_paap_rk(pi, v_pi, z.T @ z, v.T @ v, n)
    s_half = np.linalg.inv(np.linalg.cholesky(sigma))
    cd = np.linalg.eigvalsh(s_half @ (y.T @ z @ np.linalg.solve(z.T @ z, z.T @ y)) @ s_half.T).min()
    assert rk == pytest.approx(cd, rel=1e-9)


def test_two_endogenous_regressors_match_linearmodels(wages) -> None:
    """Source: linearmodels IV2SLS with two endogenous regressors and dummy columns."""
    d = wages
    est = Estimator("two_stage_least_squares", ("union", "married", "occupation"), ("expersq",))
    r = fit_one(d, "lwage", "hours", absorb=parse_absorb(["nr", "year"]), inference=Inference("hc1"),
                estimator=est, unit="nr", time="year")
    m = IV2SLS(d["lwage"], _dummies(d, ["nr", "year"]), d[["hours", "expersq"]],
               d[["union", "married", "occupation"]]).fit(cov_type="robust", debiased=True)
    assert r.estimate == pytest.approx(m.params["hours"], rel=1e-8)
    assert r.std_error == pytest.approx(m.std_errors["hours"], rel=1e-7)
    assert math.isnan(r.effective_f) and r.kp_f > 0 and r.ar_set == ""


# ---- Poisson PML --------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def scrap(jobtraining) -> pd.DataFrame:
    d = jobtraining.reset_index() if "fcode" not in jobtraining.columns else jobtraining
    return d.dropna(subset=["scrap", "hrsemp", "employ"]).reset_index(drop=True)


def _kept_by_hand(d: pd.DataFrame) -> pd.DataFrame:
    """Rows of firms with some scrap, then without singleton firms (pandas, by hand)."""
    kept = d[d.groupby("fcode")["scrap"].transform("sum") > 0]
    return kept[kept.groupby("fcode")["fcode"].transform("size") > 1]


@pytest.mark.parametrize("kind", ["homoskedastic", "hc1", "clustered"])
def test_poisson_pml_matches_statsmodels_glm_with_dummies(scrap, kind) -> None:
    """Source: statsmodels GLM(family=Poisson()) with firm and year dummy columns, on the rows left once
    firms with no scrap at all are removed (their effects would diverge). homoskedastic = Pearson
    dispersion (statsmodels scale='X2'); hc1 = HC0 x sqrt(N / (N - K)); clustered by firm =
    statsmodels' cluster errors with the firm dummies left out of K."""
    by = (("fcode",),) if kind == "clustered" else ()
    r = fit_one(scrap, "scrap", "hrsemp", controls=["employ"], absorb=parse_absorb(["fcode", "year"]),
                inference=Inference(kind, by), estimator=Estimator("poisson_pml"), unit="fcode", time="year")
    assert r.status == "ok", r.message
    kept = _kept_by_hand(scrap)
    assert r.n_obs == len(kept)
    assert r.n_separated + r.n_singletons == len(scrap) - len(kept)
    x = pd.concat([kept[["hrsemp", "employ"]], _dummies(kept, ["fcode", "year"])], axis=1)
    glm = sm.GLM(kept["scrap"], x, family=sm.families.Poisson())
    n, k_all = len(kept), x.shape[1]
    if kind == "homoskedastic":
        ref = glm.fit(tol=1e-13, scale="X2")
        se = ref.bse["hrsemp"]
    elif kind == "hc1":
        ref = glm.fit(tol=1e-13, cov_type="HC0")
        se = ref.bse["hrsemp"] * math.sqrt(n / (n - k_all))
    else:
        ref = glm.fit(tol=1e-13, cov_type="cluster", cov_kwds={"groups": pd.factorize(kept["fcode"])[0]})
        g = kept["fcode"].nunique()
        se = ref.bse["hrsemp"] * math.sqrt((n - k_all) / (n - (k_all - g)))
    assert r.estimate == pytest.approx(ref.params["hrsemp"], rel=1e-7)
    assert r.std_error == pytest.approx(se, rel=1e-6)
    assert r.converged


def test_poisson_pml_drops_a_regressor_separated_zero_and_matches_glm_without_it(scrap) -> None:
    """Source: statsmodels GLM with dummies on the rows without the separated observations. The scrap
    rate is set to zero in one year of two firms observed in all three years, and a regressor is 1
    exactly there (0 elsewhere): it separates those zeros (its coefficient would run to minus
    infinity); fegrid removes them, counts them and drops the regressor, then 0 throughout."""
    kept = _kept_by_hand(scrap)
    full = kept[kept.groupby("fcode")["fcode"].transform("size") == 3]
    zero_rows = full.drop_duplicates("fcode").index[:2]
    d = scrap.assign(flag=0.0)
    d.loc[zero_rows, ["flag", "scrap"]] = [1.0, 0.0]
    r = fit_one(d, "scrap", "hrsemp", controls=["employ", "flag"], absorb=parse_absorb(["fcode", "year"]),
                inference=Inference("hc1"), estimator=Estimator("poisson_pml"), unit="fcode", time="year")
    assert r.status == "ok", r.message
    assert "flag (separated)" in r.controls_dropped
    rest = _kept_by_hand(d.drop(index=zero_rows))
    assert r.n_obs == len(rest) and np.isfinite(r.estimate)
    x = pd.concat([rest[["hrsemp", "employ"]], _dummies(rest, ["fcode", "year"])], axis=1)
    ref = sm.GLM(rest["scrap"], x, family=sm.families.Poisson()).fit(tol=1e-13)
    assert r.estimate == pytest.approx(ref.params["hrsemp"], rel=1e-7)


def test_poisson_pml_refuses_a_negative_outcome(scrap) -> None:
    d = scrap.assign(change=scrap["scrap"] - 1.0)
    r = fit_one(d, "change", "hrsemp", absorb=parse_absorb(["fcode"]), estimator=Estimator("poisson_pml"),
                unit="fcode")
    assert r.status == "failed" and "non-negative" in r.message and "'change'" in r.message


def test_every_coefficient_is_kept_with_a_covariance_whose_focal_element_is_the_ledger_se(wages) -> None:
    """The long coefficient table's focal row is the ledger's estimate and SE (all three methods);
    its other rows match linearmodels IV2SLS with dummies (source) for 2SLS."""
    d = wages
    settings = BlockSettings(absorb=parse_absorb(["nr", "year"]), unit="nr", time="year")
    specs = [SpecRequest("ols", "lwage", "hours", ("expersq",), Inference("clustered", (("nr",),))),
             SpecRequest("iv", "lwage", "hours", ("expersq",), Inference("hc1"), TWO_SLS),
             SpecRequest("pml", "hours", "union", ("expersq",), Inference("hc1"), Estimator("poisson_pml"))]
    fit = fit_block(d, settings, specs)
    by_id = {r.spec_id: r for r in fit.results}
    for sid, res in by_id.items():
        c = fit.coefficients[sid]
        assert c.terms[0] == {"ols": "hours", "iv": "hours", "pml": "union"}[sid]
        assert c.estimates[0] == pytest.approx(res.estimate, rel=1e-12)
        assert math.sqrt(c.covariance[0, 0]) == pytest.approx(res.std_error, rel=1e-9)
    c = fit.coefficients["iv"]
    assert c.terms == ("hours", "expersq")
    exog = pd.concat([d[["expersq"]], _dummies(d, ["nr", "year"])], axis=1)
    m = IV2SLS(d["lwage"], exog, d[["hours"]], d[["union", "married"]]).fit(cov_type="robust", debiased=True)
    assert c.estimates[1] == pytest.approx(m.params["expersq"], rel=1e-7)
    assert c.covariance[0, 1] == pytest.approx(m.cov.loc["hours", "expersq"], rel=1e-6)


def test_poisson_pml_on_hours_worked_matches_statsmodels_glm(wages) -> None:
    """Source: statsmodels GLM(family=Poisson()) with worker and year dummy columns: annual hours
    worked (non-negative) on union membership, wage_panel. (A first step judged against the
    deviance of the starting values, which are not of the model's form, once stopped here at zero.)"""
    d = wages
    r = fit_one(d, "hours", "union", controls=["expersq"], absorb=parse_absorb(["nr", "year"]),
                inference=Inference("homoskedastic"), estimator=Estimator("poisson_pml"), unit="nr", time="year")
    kept = d[d.groupby("nr")["union"].transform("size") > 1]
    x = pd.concat([kept[["union", "expersq"]], _dummies(kept, ["nr", "year"])], axis=1)
    ref = sm.GLM(kept["hours"], x, family=sm.families.Poisson()).fit(tol=1e-13, scale="X2")
    assert r.estimate == pytest.approx(ref.params["union"], rel=1e-7)
    assert r.std_error == pytest.approx(ref.bse["union"], rel=1e-6)



def test_poisson_pml_with_worker_and_group_by_year_effects_matches_statsmodels_glm(wages) -> None:
    """Source: statsmodels GLM(family=Poisson()) with worker and group-by-year dummy columns: annual hours
    worked on union membership, wage_panel's first 150 workers less some worker-years, the workers in 7
    invented groups (worker number modulo 7). The two effects form 7 separate systems (one per group),
    solved directly after alternating projections; each later step reuses the systems' layout and
    jumps to the direct solution after its first sweep."""
    d = wages[~((wages["year"] == 1983 + wages["nr"] % 3) & (wages["nr"] % 5 == 0))]
    d = d.assign(group_year=(d["nr"] % 7) * 10000 + d["year"])
    r = fit_one(d, "hours", "union", controls=["expersq"], absorb=parse_absorb(["nr", "group_year"]),
                inference=Inference("clustered", (("nr",),)), estimator=Estimator("poisson_pml"), unit="nr",
                time="year")
    assert r.status == "ok", r.message
    kept = d[d.groupby("nr")["union"].transform("size") > 1]
    assert r.n_obs == len(kept)
    # full rank: a constant, the workers but the first, each group's years but its first
    group_years = pd.get_dummies(kept["group_year"]).astype(float)
    firsts = kept.groupby(kept["nr"] % 7)["group_year"].min()
    x = pd.concat([kept[["union", "expersq"]], _dummies(kept, ["nr"]),
                   group_years.drop(columns=list(firsts))], axis=1)
    assert np.linalg.matrix_rank(x.to_numpy(dtype=float)) == x.shape[1]
    ref = sm.GLM(kept["hours"], x, family=sm.families.Poisson()).fit(
        tol=1e-13, cov_type="cluster", cov_kwds={"groups": pd.factorize(kept["nr"])[0]})
    assert r.estimate == pytest.approx(ref.params["union"], rel=1e-7)
    # statsmodels counts every column in K; fegrid leaves out the worker effects, nested in the clusters
    n, k_all, g = len(kept), x.shape[1], kept["nr"].nunique()
    assert r.std_error == pytest.approx(ref.bse["union"] * math.sqrt((n - k_all) / (n - (k_all - g))), rel=1e-6)


def test_the_wild_bootstrap_is_left_to_least_squares_and_says_so(wages) -> None:
    """A clustering choice with a wild cluster bootstrap gives 2SLS and Poisson PML their clustered
    inference and a message, never a least-squares bootstrap p-value under their name."""
    from fegrid.wild import WildBootstrap

    inference = Inference("clustered", (("nr",),), WildBootstrap(draws=99, seed=1))
    for estimator, outcome in ((TWO_SLS, "lwage"), (Estimator("poisson_pml"), "hours")):
        r = fit_one(wages, outcome, "hours" if outcome == "lwage" else "union", absorb=parse_absorb(["nr", "year"]),
                    inference=inference, estimator=estimator, unit="nr", time="year")
        assert r.status == "ok" and math.isnan(r.wild_p_value) and r.wild_draws == 0
        assert "wild cluster bootstrap is computed for least squares only" in r.message


@pytest.mark.parametrize("hours_unit", [1.0, 3600.0])
def test_two_stage_identification_does_not_depend_on_the_units_of_a_control(wage_panel, hours_unit) -> None:
    """Source: linearmodels IV2SLS(debiased=True) on wage_panel, pooled: marriage instrumented by
    experience, with experience squared and annual hours (or seconds) of work as controls.

    The first stage's rank check once compared the eigenvalues of ``X'PX`` as they came: their
    ratio is 1.7e-8 with hours and 1.3e-15 with seconds (the 0/1 regressor beside a column in the
    millions), below the 1e-10 cut-off, so the same specification was reported not identified in
    seconds. Scaled to a unit diagonal, its smallest eigenvalue is 0.11 in either unit."""
    d = wage_panel.assign(hours=wage_panel["hours"] * hours_unit)
    r = fit_one(d, "lwage", "married", controls=["expersq", "hours"], absorb=parse_absorb([]),
                inference=Inference("hc1"), estimator=Estimator("two_stage_least_squares", ("exper",)),
                unit="nr", time="year")
    assert r.status == "ok", r.message
    exog = d[["expersq", "hours"]].assign(const=1.0)
    m = IV2SLS(d["lwage"], exog, d[["married"]], d[["exper"]]).fit(cov_type="robust", debiased=True)
    assert r.estimate == pytest.approx(m.params["married"], rel=1e-8)
    assert r.std_error == pytest.approx(m.std_errors["married"], rel=1e-7)
