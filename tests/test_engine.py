"""The estimation engine: textbook examples, dummy-variable regressions, ranks, block evaluation."""

from __future__ import annotations

import gc
import sys
import weakref

import numpy as np
import pandas as pd
import pytest

from fegrid import covariance, estimate
from fegrid.absorb import (
    DIRECT_AFTER,
    DIRECT_AFTER_DENSE,
    Absorber,
    EffectTerm,
    TrendTerm,
    _TwoTerms,
    drop_singletons,
    factorize,
    parse_absorb,
)
from fegrid.covariance import cluster_sums
from fegrid.errors import ConfigError, EstimationError
from fegrid.estimate import BlockSettings, Inference, SpecRequest, fit_block, fit_one
from fegrid.memory import reuse_freed_memory
from fegrid.store import FileDemeanStore

IID = Inference("homoskedastic")


# ---- textbook worked examples (published values recalled from memory) ---------------------------

def test_wooldridge_example_14_4_wage_panel(wage_panel: pd.DataFrame) -> None:
    """Wooldridge, Introductory Econometrics, Example 14.4 / Table 14.2, fixed-effects column
    (from memory): married .047 (.018), union .080 (.019), exper^2 -.0052 (.0007), year dummies."""
    ab = parse_absorb(["nr", "year"])
    union = fit_one(wage_panel, "lwage", "union", controls=["married", "expersq"], absorb=ab, inference=IID)
    married = fit_one(wage_panel, "lwage", "married", controls=["union", "expersq"], absorb=ab, inference=IID)
    expersq = fit_one(wage_panel, "lwage", "expersq", controls=["union", "married"], absorb=ab, inference=IID)
    assert (round(union.estimate, 3), round(union.std_error, 3)) == (0.080, 0.019)
    assert (round(married.estimate, 3), round(married.std_error, 3)) == (0.047, 0.018)
    assert (round(expersq.estimate, 4), round(expersq.std_error, 4)) == (-0.0052, 0.0007)
    assert union.n_obs == 4360


def test_wooldridge_example_14_1_job_training(jobtraining: pd.DataFrame) -> None:
    """Wooldridge, Introductory Econometrics, Example 14.1 (from memory): fixed effects on log scrap,
    1987-89, n = 162: grant -.252 (.151), grant_1 -.422 (.210); year effects replace d88, d89."""
    ab = parse_absorb(["fcode", "year"])
    grant = fit_one(jobtraining, "lscrap", "grant", controls=["grant_1"], absorb=ab, inference=IID)
    lag = fit_one(jobtraining, "lscrap", "grant_1", controls=["grant"], absorb=ab, inference=IID)
    assert grant.n_obs == 162  # rows with a missing log scrap rate are dropped for this spec only
    assert (round(grant.estimate, 3), round(grant.std_error, 3)) == (-0.252, 0.151)
    assert (round(lag.estimate, 3), round(lag.std_error, 3)) == (-0.422, 0.210)


def test_grunfeld_ten_firm_within_estimates(grunfeld: pd.DataFrame) -> None:
    """Baltagi, Econometric Analysis of Panel Data, Table 2.1, within estimator on the classic
    ten-firm Grunfeld data (from memory): value 0.1101 (0.0119), capital 0.3101 (0.0174).
    statsmodels' copy adds American Steel, which is left out here."""
    ten = grunfeld[grunfeld["firm"] != "American Steel"]
    ab = parse_absorb(["firm"])
    value = fit_one(ten, "invest", "value", controls=["capital"], absorb=ab, inference=IID)
    capital = fit_one(ten, "invest", "capital", controls=["value"], absorb=ab, inference=IID)
    assert value.n_obs == 200
    assert (round(value.estimate, 4), round(value.std_error, 4)) == (0.1101, 0.0119)
    assert (round(capital.estimate, 4), round(capital.std_error, 4)) == (0.3101, 0.0174)


# ---- a second algorithm: least squares with explicit dummy variables (statsmodels) ---------------

def _lsdv(frame: pd.DataFrame, formula: str, weights: str | None = None):
    smf = pytest.importorskip("statsmodels.formula.api")
    if weights:
        return smf.wls(formula, data=frame, weights=frame[weights]).fit()
    return smf.ols(formula, data=frame).fit()


def test_three_effects_weighted_equal_dummy_regression(wage_panel: pd.DataFrame) -> None:
    """Source: statsmodels WLS with explicit dummies for worker, year and occupation, weighted by
    hours, on linearmodels' wage_panel: same coefficient to 1e-8 (relative)."""
    lsdv = _lsdv(wage_panel, "lwage ~ union + married + expersq + C(nr) + C(year) + C(occupation)",
                 weights="hours")
    res = fit_one(wage_panel, "lwage", "union", controls=["married", "expersq"],
                  absorb=parse_absorb(["nr", "year", "occupation"]), weights="hours", inference=IID)
    assert res.converged
    assert res.estimate == pytest.approx(lsdv.params["union"], rel=1e-8)
    # the absorbed df is the rank of the dummies: their count less the redundant ones
    assert res.absorbed_df == int(lsdv.df_model) + 1 - 3


def test_unit_trends_equal_dummy_regression(wage_panel: pd.DataFrame) -> None:
    """Source: statsmodels OLS with a dummy and a linear trend per worker plus year dummies, on
    linearmodels' wage_panel: same coefficient, SE and absorbed df. The dummy matrix is built full
    rank (one year dummy and one worker slope left out: the slopes sum to t, which the year dummies
    span), since a rank-deficient one makes the pseudo-inverse inaccurate at this size."""
    sm = pytest.importorskip("statsmodels.api")
    df = wage_panel.assign(t=wage_panel["year"] - 1980)
    unit = pd.get_dummies(df["nr"]).to_numpy(dtype=float)
    slopes = unit * df["t"].to_numpy()[:, None]
    years = pd.get_dummies(df["year"]).to_numpy(dtype=float)
    design = np.hstack([df[["union", "married"]].to_numpy(float), unit, slopes[:, :-1], years[:, 1:]])
    lsdv = sm.OLS(df["lwage"].to_numpy(), design).fit()
    res = fit_one(df, "lwage", "union", controls=["married"],
                  absorb=(TrendTerm("nr"), EffectTerm(("year",))), time="t", inference=IID)
    assert res.estimate == pytest.approx(lsdv.params[0], rel=1e-8)
    assert res.absorbed_df == design.shape[1] - 2
    assert res.df_inference == pytest.approx(lsdv.df_resid)
    assert res.std_error == pytest.approx(lsdv.bse[0], rel=1e-6)


def test_unbalanced_two_way_equals_dummy_regression(jobtraining: pd.DataFrame) -> None:
    """Source: statsmodels OLS with firm and year dummies on linearmodels' jobtraining (unbalanced
    once rows with missing scrap rates are dropped), and its classical SE."""
    df = jobtraining.dropna(subset=["lscrap"])
    df = df[df.groupby("fcode")["year"].transform("size") > 1]
    df = df.iloc[5:]  # make it unbalanced
    lsdv = _lsdv(df, "lscrap ~ grant + grant_1 + C(fcode) + C(year)")
    res = fit_one(df, "lscrap", "grant", controls=["grant_1"], absorb=parse_absorb(["fcode", "year"]),
                  inference=IID)
    assert res.estimate == pytest.approx(lsdv.params["grant"], rel=1e-8)
    assert res.std_error == pytest.approx(lsdv.bse["grant"], rel=1e-6)


def test_absorbed_df_equals_rank_of_dummies(wage_panel: pd.DataFrame) -> None:
    """Source: numpy's matrix_rank of the explicit dummy matrix (worker, year x occupation, year),
    where year is nested in year x occupation and so redundant."""
    df = wage_panel[wage_panel["nr"] < 2000]
    terms = parse_absorb(["nr", "year x occupation", "year"])
    absorber = Absorber(df, terms)
    dummies = pd.get_dummies(df[["nr"]].astype(str)).join(
        pd.get_dummies(df["year"].astype(str) + "_" + df["occupation"].astype(str), prefix="yo")
    ).join(pd.get_dummies(df["year"].astype(str), prefix="y"))
    assert absorber.absorbed_df == np.linalg.matrix_rank(dummies.to_numpy(dtype=float))


# ---- singletons, rank, identification, convergence -------------------------------------------------

def test_singletons_are_removed_until_none_remain() -> None:
    """Correia (2015): dropping one singleton can create another; removal repeats (common practice).
    Keys only: worker a appears once; after it goes, firm F holds one row, and so on."""
    keys = pd.DataFrame({
        "worker": ["a", "b", "b", "c", "c", "d", "d", "e", "e"],
        "firm":   ["F", "F", "G", "G", "H", "H", "H", "H", "H"],
    })
    keep = drop_singletons(keys, parse_absorb(["worker", "firm"]))
    # a (singleton worker) -> F holds only b's row -> b holds only its G row -> G holds only c's
    # row -> c holds only its H row; d, e and H keep two or more rows each
    assert keep.tolist() == [False] * 5 + [True] * 4
    assert drop_singletons(keys, parse_absorb(["firm"])).tolist() == [True] * 9


def test_singleton_count_recorded_and_option_keeps_them(wage_panel: pd.DataFrame) -> None:
    """Source: the wage panel with one worker cut to one year: one singleton dropped by default."""
    df = wage_panel[~((wage_panel["nr"] == 13) & (wage_panel["year"] > 1980))]
    dropped = fit_one(df, "lwage", "union", absorb=parse_absorb(["nr", "year"]))
    kept = fit_one(df, "lwage", "union", absorb=parse_absorb(["nr", "year"]), keep_singletons=True)
    assert dropped.n_singletons == 1 and dropped.n_obs == len(df) - 1
    assert kept.n_singletons == 0 and kept.n_obs == len(df)
    # a singleton's own dummy fits it exactly: the coefficient does not move
    assert kept.estimate == pytest.approx(dropped.estimate, rel=1e-9)


def test_focal_absorbed_by_unit_effects_is_not_identified(wage_panel: pd.DataFrame) -> None:
    """Years of schooling never change within a worker in wage_panel: unit effects absorb them."""
    res = fit_one(wage_panel, "lwage", "educ", absorb=parse_absorb(["nr"]), unit="nr")
    assert res.status == "not_identified"
    assert "absorbed by the fixed effects" in res.message and np.isnan(res.estimate)
    assert res.units_with_variation == 0
    pooled = fit_one(wage_panel, "lwage", "educ", absorb=(), unit="nr")
    assert pooled.status == "ok"


def test_collinear_focal_and_controls(wage_panel: pd.DataFrame) -> None:
    df = wage_panel.assign(union_copy=wage_panel["union"] * 2.0, married_copy=wage_panel["married"])
    res = fit_one(df, "lwage", "union", controls=["union_copy"], absorb=parse_absorb(["nr"]))
    assert res.status == "not_identified" and "collinear with the controls" in res.message
    # a collinear control is dropped (the later one in sorted order), an absorbed one too
    ok = fit_one(df, "lwage", "union", controls=["married", "married_copy", "educ"],
                 absorb=parse_absorb(["nr"]))
    assert ok.status == "ok"
    assert ok.controls_dropped == "married_copy (collinear); educ (absorbed)"
    ref = fit_one(df, "lwage", "union", controls=["married"], absorb=parse_absorb(["nr"]))
    assert ok.estimate == pytest.approx(ref.estimate, rel=1e-10)


def test_non_convergence_is_recorded(wage_panel: pd.DataFrame) -> None:
    res = fit_one(wage_panel.iloc[:-7], "lwage", "union",
                  absorb=parse_absorb(["nr", "year", "occupation"]), inference=IID)
    capped = fit_block(
        wage_panel.iloc[:-7],
        BlockSettings(absorb=parse_absorb(["nr", "year", "occupation"]), max_iterations=2),
        [SpecRequest("s", "lwage", "union")],
    ).results[0]
    assert res.converged and res.iterations < 100
    assert not capped.converged and "did not reach the tolerance" in capped.message
    assert capped.iterations == 2


def test_identifying_variation_diagnostics(wage_panel: pd.DataFrame) -> None:
    """Mummolo & Peterson (2018): report the SD of the focal regressor after the fixed effects."""
    res = fit_one(wage_panel, "lwage", "union", absorb=parse_absorb(["nr"]), unit="nr")
    x = wage_panel["union"]
    within = x - x.groupby(wage_panel["nr"]).transform("mean")
    assert res.focal_sd == pytest.approx(x.std(), rel=1e-12)
    assert res.focal_sd_within == pytest.approx(within.std(), rel=1e-9)
    assert res.focal_variance_share == pytest.approx((within**2).sum() / ((x - x.mean()) ** 2).sum(), rel=1e-9)
    assert res.units_with_variation == int((x.groupby(wage_panel["nr"]).nunique() > 1).sum())


# ---- block evaluation -------------------------------------------------------------------------------

def test_block_equals_one_at_a_time_and_shares_demeaning(jobtraining: pd.DataFrame) -> None:
    """Every spec of a block equals its separate fit; specs with the same complete-case rows share
    one demeaning (lscrap and lsales have different missing rows, so two designs)."""
    df = jobtraining
    settings = BlockSettings(absorb=parse_absorb(["fcode", "year"]), unit="fcode", time="year")
    infs = [Inference("homoskedastic"), Inference("hc1"), Inference("clustered", (("fcode",),)),
            Inference("two_way_clustered", (("fcode",), ("year",)))]
    specs = []
    for outcome in ("lscrap", "lemploy"):
        for controls in ((), ("grant_1",)):
            for j, inf in enumerate(infs):
                specs.append(SpecRequest(f"{outcome}-{len(controls)}-{j}", outcome, "grant", controls, inf))
    block = fit_block(df, settings, specs)
    assert block.designs == 2
    for spec, res in zip(specs, block.results):
        one = fit_one(df, spec.outcome, spec.focal, controls=spec.controls, absorb=settings.absorb,
                      inference=spec.inference, unit="fcode", time="year")
        assert res.spec_id == spec.spec_id
        assert res.estimate == pytest.approx(one.estimate, rel=1e-12)
        assert res.std_error == pytest.approx(one.std_error, rel=1e-12)
        assert res.n_obs == one.n_obs


def test_store_reuses_demeaned_columns(tmp_path, wage_panel: pd.DataFrame) -> None:
    store = FileDemeanStore(tmp_path)
    settings = BlockSettings(absorb=parse_absorb(["nr", "year"]))
    specs = [SpecRequest("a", "lwage", "union", ("married",), Inference("clustered", (("nr",),)))]
    first = fit_block(wage_panel, settings, specs, store=store, data_key="wage")
    more = specs + [SpecRequest("b", "lwage", "union", ("married",), Inference("hc1"))]
    second = fit_block(wage_panel, settings, more, store=store, data_key="wage")
    assert first.columns_demeaned == 3 and first.columns_reused == 0
    assert second.columns_demeaned == 0 and second.columns_reused == 3
    # every field equal, missing values (the wild bootstrap's, not run here) included
    assert pd.Series(second.results[0].record()).equals(pd.Series(first.results[0].record()))
    other = fit_block(wage_panel, settings, specs, store=store, data_key="other data")
    assert other.columns_demeaned == 3


def test_unknown_covariance_kind_lists_the_kinds() -> None:
    with pytest.raises(EstimationError, match="homoskedastic, hc1, clustered, two_way_clustered"):
        Inference("hc3")
    with pytest.raises(EstimationError, match="takes 1 cluster"):
        Inference("clustered", ())


def test_parse_terms() -> None:
    assert parse_absorb(["a", "b x c", {"trend": "a"}, "a"]) == (
        EffectTerm(("a",)), EffectTerm(("b", "c")), TrendTerm("a"))
    with pytest.raises(ConfigError, match="unknown kind"):
        parse_absorb([{"slope": "a"}])


# ---- absorbed effects nested in the clusters -----------------------------------------------------

def _dummies(frame: pd.DataFrame, columns: tuple[str, ...]) -> np.ndarray:
    """Every level's indicator of one column or of the interaction of several (no level dropped)."""
    key = frame[list(columns)].astype(str).agg("|".join, axis=1)
    return pd.get_dummies(key).to_numpy(dtype=float)


@pytest.mark.parametrize("effects", [("nr", "educ"), ("nr", "educ x year"), ("nr", "year")])
def test_nested_effects_count_their_rank_once_against_dummy_regression(wage_panel: pd.DataFrame,
                                                                       effects: tuple[str, ...]) -> None:
    """Source: statsmodels OLS with an explicit dummy column for every level (cluster-robust
    covariance), converted to the documented convention K = k + rank(all dummies) - rank(dummies of
    the terms nested in the clusters), with both ranks from numpy's matrix_rank.

    linearmodels' wage_panel, clustered by years of education (time-invariant, so every person is
    nested in one education group): `nr + educ` is the same model as `nr` alone (educ is implied by
    nr), and `nr + educ x year` has two nested terms whose dummies overlap. `nr + year` has one nested
    term and one crossing the clusters.
    """
    import statsmodels.api as sm

    terms = parse_absorb(list(effects))
    clusters = Inference("clustered", (("educ",),))
    ours = fit_one(wage_panel, "lwage", "union", controls=["married"], absorb=terms, inference=clusters,
                   keep_singletons=True)  # the dummy regression keeps every row
    blocks = [_dummies(wage_panel, t.columns) for t in terms]
    nested = [b for b, t in zip(blocks, terms) if wage_panel.groupby(list(t.columns))["educ"].nunique().max() == 1]
    regressors = wage_panel[["union", "married"]].to_numpy(dtype=float)
    dummies = np.column_stack(blocks)
    rank_all = np.linalg.matrix_rank(dummies)
    # a basis of the dummies' column space (QR with column pivoting), so the reference design has
    # full column rank: a pseudo-inverse of the redundant design decides its rank numerically, and
    # that decision differs between numpy/statsmodels releases
    import scipy.linalg

    pivots = scipy.linalg.qr(dummies, mode="economic", pivoting=True)[2]
    design = np.column_stack([regressors, dummies[:, np.sort(pivots[:rank_all])]])
    assert np.linalg.matrix_rank(design) == design.shape[1]
    groups = pd.factorize(wage_panel["educ"])[0]
    ref = sm.OLS(wage_panel["lwage"].to_numpy(), design).fit(cov_type="cluster", cov_kwds={"groups": groups})
    n, k = len(wage_panel), 2
    rank_nested = np.linalg.matrix_rank(np.column_stack(nested)) if nested else 0
    # statsmodels' clustered factor counts every column of the design, K = its width
    k_ours, k_sm = k + rank_all - rank_nested, design.shape[1]
    assert ours.absorbed_df == rank_all
    assert ours.estimate == pytest.approx(ref.params[0], rel=1e-8)
    assert ours.std_error == pytest.approx(ref.bse[0] * np.sqrt((n - k_sm) / (n - k_ours)), rel=1e-7)
    assert k_ours >= k


def test_a_redundant_nested_term_changes_no_standard_error(wage_panel: pd.DataFrame) -> None:
    """`nr + educ` is the model `nr` (educ is constant within nr): every number must be identical
    (published identity: the column spaces of the two dummy sets are equal)."""
    clusters = Inference("clustered", (("educ",),))
    one = fit_one(wage_panel, "lwage", "union", controls=["married"], absorb=parse_absorb(["nr"]), inference=clusters)
    two = fit_one(wage_panel, "lwage", "union", controls=["married"], absorb=parse_absorb(["nr", "educ"]),
                  inference=clusters)
    assert two.estimate == pytest.approx(one.estimate, rel=1e-9)
    assert two.std_error == pytest.approx(one.std_error, rel=1e-9)


# ---- values a regression cannot use --------------------------------------------------------------

def test_overflowing_or_infinite_values_never_give_an_ok_row(grunfeld: pd.DataFrame) -> None:
    """A value of 1e308 made the estimate -inf with status ok; inf crashed the linear algebra.
    Both must be a `failed` row with the reason, and the other specifications of the block must
    be unaffected (common practice: no non-finite number is ever reported as an estimate)."""
    huge = grunfeld.assign(big=grunfeld["value"].where(grunfeld.index != 7, 1e308),
                           inf=grunfeld["value"].where(grunfeld.index != 7, np.inf))
    settings = BlockSettings(absorb=parse_absorb(["firm"]))
    specs = [SpecRequest("a", "invest", "big"), SpecRequest("b", "invest", "inf"),
             SpecRequest("c", "invest", "value", ("capital",)), SpecRequest("d", "big", "capital")]
    res = {r.spec_id: r for r in fit_block(huge, settings, specs).results}
    for key in ("a", "b", "d"):
        assert res[key].status == "failed", res[key]
        assert "infinite values" in res[key].message or "not finite" in res[key].message
        assert not (res[key].status == "ok" and not np.isfinite(res[key].estimate))
    alone = fit_one(grunfeld, "invest", "value", controls=["capital"], absorb=parse_absorb(["firm"]))
    assert res["c"].status == "ok" and res["c"].estimate == pytest.approx(alone.estimate, rel=1e-10)


def test_the_engine_version_is_part_of_the_demeaned_columns_key() -> None:
    """Columns demeaned by another version of the engine are never reused (common practice)."""
    from fegrid import __version__

    assert f'"fegrid": "{__version__}"' in BlockSettings().demean_key()


def test_demeaning_a_column_does_not_depend_on_its_companions(wage_panel: pd.DataFrame) -> None:
    """A column demeaned alone and together with others gives the same bytes and iteration count,
    so that refitting part of a grid reproduces a cold run exactly (common practice for
    reproducible pipelines). Before, a column that converged early changed the others' path."""
    terms = parse_absorb(["nr", "year", "occupation"])
    ab = Absorber(wage_panel, terms)
    cols = ["lwage", "black", "hours", "union", "expersq"]  # black is absorbed by nr: converges at once
    together = ab.demean(wage_panel[cols].to_numpy(dtype=float))
    for j, col in enumerate(cols):
        alone = ab.demean(wage_panel[[col]].to_numpy(dtype=float))
        assert alone.iterations[0] == together.iterations[j], col
        assert np.array_equal(alone.values[:, 0], together.values[:, j]), col


def _unbalanced(panel: pd.DataFrame) -> pd.DataFrame:
    """wage_panel less a year of some workers: alternating projections then converge slowly."""
    return panel[~((panel["year"] == 1983 + panel["nr"] % 3) & (panel["nr"] % 5 == 0))]


@pytest.mark.parametrize("case", ["two_way", "two_way_weighted", "trend_and_year", "worker_and_group_by_year"])
def test_two_terms_are_projected_directly_to_the_dummy_regression(case: str, wage_panel: pd.DataFrame,
                                                                  jobtraining: pd.DataFrame) -> None:
    """Source: numpy least squares on explicit dummy columns (firm and year dummies on linearmodels'
    jobtraining, unbalanced once missing scrap rates are dropped; a dummy and a slope per worker plus
    year dummies on linearmodels' wage_panel less some worker-years; worker dummies and group-by-year
    dummies, the groups holding whole workers, on the same: 37 separate systems). Two terms of which
    one is a categorical effect with few levels in each connected part are solved directly: at once
    when they form one dense system (when the columns start warm, as in a Poisson fit's steps, after
    their group sums), after ten sweeps when the system splits into many parts; the terms' group sums (or,
    failing them, one more sweep) confirm the solution, which is exact to rounding (alternating
    projections stop at the tolerance, up to 1e-8 away on these data at the default tolerance)."""
    small = "year"
    if case == "trend_and_year":
        df = _unbalanced(wage_panel[wage_panel["nr"] < 3000]).assign(t=lambda d: d["year"] - 1980.0)
        terms, unit, weights = (TrendTerm("nr"), EffectTerm(("year",))), "nr", None
        cols = ["lwage", "union", "hours"]
    elif case == "worker_and_group_by_year":
        df = _unbalanced(wage_panel).assign(t=lambda d: d["year"] - 1980.0, group=lambda d: d["nr"] % 37,
                               group_year=lambda d: d["nr"] % 37 * 10000 + d["year"])
        terms, unit, weights, small = parse_absorb(["nr", "group x year"]), "nr", None, "group_year"
        cols = ["lwage", "union", "hours"]
    else:
        df = jobtraining.dropna(subset=["lscrap"]).iloc[5:].assign(t=lambda d: d["year"] - 1987.0)
        terms, unit = parse_absorb(["fcode", "year"]), "fcode"
        weights = df["employ"].fillna(1.0).to_numpy(dtype=float) + 1.0 if case.endswith("weighted") else None
        cols = ["lscrap", "grant", "grant_1"]
    absorber = Absorber(df, terms, weights=weights, time="t", tolerance=1e-14)  # every column needs the jump
    out = absorber.demean(df[cols].to_numpy(dtype=float))
    dummies = [pd.get_dummies(df[unit]).to_numpy(dtype=float), pd.get_dummies(df[small]).to_numpy(dtype=float)]
    if case == "trend_and_year":
        dummies.append(dummies[0] * df["t"].to_numpy()[:, None])
    d = np.hstack(dummies)
    sw = np.sqrt(np.ones(len(df)) if weights is None else weights)[:, None]
    x = df[cols].to_numpy(dtype=float)
    exact = x - d @ np.linalg.lstsq(d * sw, x * sw, rcond=None)[0]
    assert absorber._direct is not None
    after = absorber._direct_setup[2]  # no sweep for one dense system, ten for many parts
    assert after == (DIRECT_AFTER if case == "worker_and_group_by_year" else DIRECT_AFTER_DENSE)
    assert np.all(out.iterations <= after + 1) and out.iterations.max() == after + 1
    assert np.all(out.converged)
    assert np.max(np.abs(out.values - exact)) <= 1e-11 * np.max(np.abs(x))
    warm = absorber.demean(x, warm=True)  # a warm start away from its solution jumps when a cold one does
    assert warm.iterations.max() == after + 1 and np.all(warm.converged)
    assert np.max(np.abs(warm.values - exact)) <= 1e-11 * np.max(np.abs(x))
    for j in range(len(cols)):  # a column alone gives the same bytes (see the test above)
        assert np.array_equal(absorber.demean(x[:, [j]]).values[:, 0], out.values[:, j])



def test_parts_systems_are_solved_by_shifted_cholesky_as_by_the_pseudo_inverse() -> None:
    """Source: numpy's pseudo-inverse (``np.linalg.pinv``, hermitian) of each connected part's system. The
    direct solver inverts ``A + a 11' / k`` (``A 1 = 0``) by a batched Cholesky factorization, parts of
    several sizes padded to the largest: on right-hand sides summing to zero it must give the
    pseudo-inverse's solution, the padding must stay zero, and a part that is not connected (a second
    null direction: the shifted system stays singular) must take the pseudo-inverse itself."""
    from fegrid.absorb import _part_inverses

    rng = np.random.default_rng(7)
    sizes = [5, 3, 5, 4]
    k = max(sizes)
    stack, real = np.zeros((len(sizes), k, k)), np.zeros((len(sizes), k), dtype=bool)
    systems = []
    for p, size in enumerate(sizes):
        # a part's system D'W M_P D: groups of the large term spread over the part's levels
        counts = rng.uniform(0.0, 3.0, size=(12, size)) * (rng.random((12, size)) < 0.7)
        counts[:, 0] += 0.5  # every group meets the first level: one connected part
        if p == 3:  # two separate halves: not connected
            counts = np.zeros((12, size))
            counts[:6, :2] = rng.uniform(0.5, 2.0, size=(6, 2))
            counts[6:, 2:] = rng.uniform(0.5, 2.0, size=(6, size - 2))
        a = np.diag(counts.sum(axis=0)) - (counts / counts.sum(axis=1, keepdims=True)).T @ counts
        systems.append(a)
        stack[p, :size, :size] = a
        real[p, :size] = True
    inverses = _part_inverses(stack, real)
    for p, (size, a) in enumerate(zip(sizes, systems)):
        assert np.all(inverses[p][~real[p]] == 0.0) and np.all(inverses[p][:, ~real[p]] == 0.0)
        rhs = rng.normal(size=size)
        rhs -= rhs.mean() if p != 3 else 0.0
        if p == 3:  # zero sum within each half: in the range of A
            rhs[:2] -= rhs[:2].mean()
            rhs[2:] -= rhs[2:].mean()
        expected = np.linalg.pinv(a, hermitian=True) @ rhs
        got = inverses[p][:size, :size] @ rhs
        # the same solution up to a constant over the part (which the large term absorbs)
        assert np.allclose(a @ got, rhs, atol=1e-10)
        assert np.allclose(got - got.mean(), expected - expected.mean(), atol=1e-10)
    assert np.allclose(inverses[3][:4, :4], np.linalg.pinv(systems[3], hermitian=True), atol=1e-10)



@pytest.mark.parametrize("weighted", [False, True])
def test_a_disconnected_two_way_panel_is_projected_exactly(weighted: bool, wage_panel: pd.DataFrame,
                                                           monkeypatch) -> None:
    """Source: numpy least squares on explicit worker and year dummies. linearmodels' wage_panel split into
    two sub-panels that share no year (even-numbered workers in 1980-1983, odd-numbered ones in
    1984-1987): held as one dense system, whose shifted matrix keeps a second null direction, so the
    pseudo-inverse takes over; the projection is still exact, at once."""
    df = wage_panel[(wage_panel["nr"] % 2 == 0) == (wage_panel["year"] <= 1983)].reset_index(drop=True)
    x = df[["lwage", "union", "expersq"]].to_numpy(dtype=float)
    w = df["hours"].to_numpy(dtype=float) / 2000 if weighted else None
    from fegrid import absorb

    fallbacks: list[int] = []
    plain = absorb._pinv_many
    monkeypatch.setattr(absorb, "_pinv_many", lambda grams: (fallbacks.append(len(grams)), plain(grams))[1])
    absorber = Absorber(df, parse_absorb(["nr", "year"]), weights=w, tolerance=1e-12)
    out = absorber.demean(x)
    assert fallbacks == [1]
    d = np.hstack([pd.get_dummies(df[c]).to_numpy(dtype=float) for c in ("nr", "year")])
    sw = np.sqrt(np.ones(len(df)) if w is None else w)[:, None]
    exact = x - d @ np.linalg.lstsq(d * sw, x * sw, rcond=None)[0]
    assert absorber._direct_layout.dense and np.all(out.iterations == 1) and np.all(out.converged)
    assert np.max(np.abs(out.values - exact)) <= 1e-12 * np.max(np.abs(x))


def test_parts_of_one_level_take_the_zero_inverse_without_pseudo_inverses(wage_panel: pd.DataFrame,
                                                                         monkeypatch) -> None:
    """Source: numpy least squares on explicit worker and group-by-year dummies (linearmodels' wage_panel,
    the workers in 37 groups by number; the even groups keep their rows of 1980 to 1982 only, and groups
    divisible by four their 1980 rows only: parts of one level among parts of three and eight). A part of
    one level has a system of zeros: its inverse is zero, and no part needs a pseudo-inverse (a part
    that failed the batched factorization once sent every part to its own factorization and
    pseudo-inverse, slower than one eigendecomposition per size); the direct solution equals the
    dummies' residuals."""
    from fegrid import absorb

    df = wage_panel.assign(group=wage_panel["nr"] % 37)
    df = df[(df["group"] % 2 == 1) | (df["year"] <= 1982 - 2 * (df["group"] % 4 == 0))]
    df = df.assign(group_year=df["group"] * 10000 + df["year"]).reset_index(drop=True)
    calls: list[int] = []
    plain = absorb._pinv_many
    monkeypatch.setattr(absorb, "_pinv_many", lambda grams: (calls.append(len(grams)), plain(grams))[1])
    absorber = Absorber(df, parse_absorb(["nr", "group_year"]), weights=df["hours"].to_numpy(dtype=float) / 2000,
                        tolerance=1e-12)
    assert sorted(set(absorber._direct_layout.sizes)) == [1, 3, 8]
    x = df[["lwage", "union", "expersq"]].to_numpy(dtype=float)
    direct = absorber._direct.apply(np.asfortranarray(x))
    assert calls == [0]  # (an empty batch: no part needed the pseudo-inverse)
    d = np.hstack([pd.get_dummies(df[c]).to_numpy(dtype=float) for c in ("nr", "group_year")])
    sw = np.sqrt(df["hours"].to_numpy(dtype=float) / 2000)[:, None]
    exact = x - d @ np.linalg.lstsq(d * sw, x * sw, rcond=None)[0]
    assert np.max(np.abs(direct - exact)) <= 1e-11 * np.max(np.abs(x))
    assert np.max(np.abs(absorber.demean(x).values - exact)) <= 1e-9 * np.max(np.abs(x))


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("names", [["nr", "year"], ["nr", "year", "occupation"]])
def test_the_sweeps_bound_from_group_sums_holds(weighted: bool, names: list[str], wage_panel: pd.DataFrame) -> None:
    """Source: the triangle inequality for orthogonal projections (the derivation in
    ``Absorber.sweep_bound``), checked on linearmodels' wage_panel less some worker-years, weighted by hours
    or not, with two and three effects. Each term's part equals ``||v - M_k v||`` computed by applying its
    residual maker; the bound is at least the sweep's change for random vectors, for vectors near the
    solution and for vectors in one effect's span; a trend gives no bound."""
    df = _unbalanced(wage_panel)
    w = df["hours"].to_numpy(dtype=float) if weighted else None
    absorber = Absorber(df, parse_absorb(names), weights=w)
    ww = np.ones(len(df)) if w is None else w
    rng = np.random.default_rng(11)
    solution = absorber.demean(df[["lwage", "union"]].to_numpy(dtype=float)).values
    worker_effects = rng.normal(size=df["nr"].nunique())[pd.factorize(df["nr"])[0]]
    vectors = [rng.normal(size=len(df)), df["lwage"].to_numpy(dtype=float), worker_effects,
               solution[:, 0] + 1e-9 * rng.normal(size=len(df)), solution[:, 1]]
    for v in vectors:
        parts = [float(np.sqrt(np.sum(ww * (v - p.apply(v[:, None])[:, 0]) ** 2))) for p in absorber._projections]
        last = len(parts) - 1
        explicit = sum(2.0 ** (last - k) * a for k, a in enumerate(parts))
        bound = absorber.sweep_bound(v)
        assert bound == pytest.approx(explicit, rel=1e-9, abs=1e-12)
        moved = v - absorber._sweep(v[:, None])[:, 0]
        assert float(np.sqrt(np.sum(ww * moved**2))) <= bound * (1 + 1e-12) + 1e-15
    trend = Absorber(df.assign(t=df["year"] - 1980.0), (TrendTerm("nr"), EffectTerm(("year",))), time="t")
    assert trend.sweep_bound(vectors[0]) is None


def test_a_direct_solution_confirmed_by_group_sums_needs_no_sweep(jobtraining: pd.DataFrame, monkeypatch) -> None:
    """Source: numpy least squares on explicit firm and year dummies (linearmodels' jobtraining, unbalanced
    once missing scrap rates are dropped). At the default tolerance the direct solution's group sums
    confirm it: no sweep is applied, one iteration is counted, and the residuals are the dummies' to
    rounding."""
    df = jobtraining.dropna(subset=["lscrap"])
    absorber = Absorber(df, parse_absorb(["fcode", "year"]))
    sweeps = []
    original = Absorber._sweep
    monkeypatch.setattr(Absorber, "_sweep", lambda self, x: sweeps.append(1) or original(self, x))
    x = df[["lscrap", "grant", "employ"]].fillna(0.0).to_numpy(dtype=float)
    out = absorber.demean(x)
    assert absorber._direct is not None and not sweeps
    assert np.all(out.iterations == 1) and np.all(out.converged)
    d = np.hstack([pd.get_dummies(df["fcode"]).to_numpy(dtype=float), pd.get_dummies(df["year"]).to_numpy(dtype=float)])
    exact = x - d @ np.linalg.lstsq(d, x, rcond=None)[0]
    assert np.max(np.abs(out.values - exact)) <= 1e-11 * np.max(np.abs(x))


def test_a_design_on_every_row_leaves_the_callers_frame_as_it_was(wage_panel: pd.DataFrame) -> None:
    """Source: linearmodels' wage_panel, no value missing: the design reads the caller's rows without a copy
    and leaves them unchanged; with a missing value in one column, that column's specifications take
    their own rows and the others all rows (their results are those on the complete frame, to rounding: they
    no longer share a design with the column)."""
    rows = wage_panel.sort_values(["nr", "year"]).reset_index(drop=True)
    before = rows.copy()
    specs = [SpecRequest(f"s{c}", "lwage", "union", controls, Inference("clustered", (("nr",),)))
             for c, controls in enumerate([(), ("hours",)])]
    settings = BlockSettings(absorb=parse_absorb(["nr", "year"]))
    complete = fit_block(rows, settings, specs)
    assert rows.equals(before) and [r.n_obs for r in complete.results] == [len(rows)] * 2
    gap = rows.assign(hours=rows["hours"].where(rows.index != 7))
    partial = fit_block(gap, settings, specs)
    assert partial.results[0].n_obs == len(rows) and partial.results[1].n_obs < len(rows)
    assert partial.results[0].estimate == pytest.approx(complete.results[0].estimate, rel=1e-12)  # (another
    assert partial.results[0].std_error == pytest.approx(complete.results[0].std_error, rel=1e-12)  # design)


def test_a_reweighted_absorber_jumps_at_once_and_a_warm_column_at_its_solution_is_kept(wage_panel: pd.DataFrame,
                                                                                       monkeypatch) -> None:
    """Source: numpy least squares on explicit worker and group-by-year dummies (linearmodels' wage_panel
    less some worker-years: 37 separate systems). A fresh absorber sweeps ten times before the direct
    solution; one reweighted from another (a Poisson step), whether or not that one built the layout,
    jumps at once (one iteration, no sweep) to the same exact solution; a warm column already at its
    solution is confirmed by its group sums as it is (no sweep, no jump). The jump projects the column as
    it came, not where sweeps left it: their extrapolated steps accumulate rounding that no projection
    removes (annual hours, weighted, at tolerance 1e-14: 7.6e-5 off after a jump from the tenth sweep)."""
    df = _unbalanced(wage_panel).assign(group_year=lambda d: d["nr"] % 37 * 10000 + d["year"])
    terms = parse_absorb(["nr", "group_year"])
    x = df[["lwage", "union", "hours"]].to_numpy(dtype=float)
    w = 1.0 + (df["nr"] % 5).to_numpy(dtype=float) / 4
    fresh = Absorber(df, terms, tolerance=1e-14)
    never = Absorber(df, terms, tolerance=1e-14).reweighted(w)  # from an absorber that never built the layout
    assert fresh.demean(x).iterations.max() == DIRECT_AFTER + 1
    inherited = fresh.reweighted(w)
    d = np.hstack([pd.get_dummies(df[c]).to_numpy(dtype=float) for c in ("nr", "group_year")])
    sw = np.sqrt(w)[:, None]
    exact = x - d @ np.linalg.lstsq(d * sw, x * sw, rcond=None)[0]
    calls: list[str] = []
    sweep, jump = Absorber._sweep, _TwoTerms.apply
    monkeypatch.setattr(Absorber, "_sweep", lambda self, v: calls.append("sweep") or sweep(self, v))
    monkeypatch.setattr(_TwoTerms, "apply", lambda self, v: calls.append("jump") or jump(self, v))
    for absorber in (inherited, never):
        calls.clear()
        got = absorber.demean(x, warm=True)
        assert calls == ["jump"] * 3 and np.all(got.iterations == 1) and np.all(got.converged)
        assert np.max(np.abs(got.values - exact)) <= 1e-11 * np.max(np.abs(x))
        calls.clear()
        kept = absorber.demean(got.values, warm=True)  # at its solution: its group sums confirm it
        assert calls == [] and np.all(kept.iterations == 1) and np.all(kept.converged)
        assert np.max(np.abs(kept.values - got.values)) <= 1e-14 * np.max(np.abs(x))


def test_an_absorber_asked_to_jump_at_once_skips_the_sweeps_and_gives_the_exact_residuals(
        wage_panel: pd.DataFrame, monkeypatch) -> None:
    """Source: numpy least squares on explicit worker and group-by-year dummies (linearmodels' wage_panel
    less some worker-years: 37 separate systems, where a fresh absorber sweeps ten times before its
    direct solution). ``direct_at_once`` (a Poisson PML draw's first absorber and its certificate of no
    separation, which build the layout anyway) jumps at once, with weights and without, to the same exact
    residuals, and its reweightings keep the layout it built."""
    df = _unbalanced(wage_panel).assign(group_year=lambda d: d["nr"] % 37 * 10000 + d["year"])
    terms = parse_absorb(["nr", "group_year"])
    x = df[["lwage", "union", "hours"]].to_numpy(dtype=float)
    d = np.hstack([pd.get_dummies(df[c]).to_numpy(dtype=float) for c in ("nr", "group_year")])
    calls: list[str] = []
    sweep, jump = Absorber._sweep, _TwoTerms.apply
    monkeypatch.setattr(Absorber, "_sweep", lambda self, v: calls.append("sweep") or sweep(self, v))
    monkeypatch.setattr(_TwoTerms, "apply", lambda self, v: calls.append("jump") or jump(self, v))
    for w in (None, 1.0 + (df["nr"] % 5).to_numpy(dtype=float) / 4):
        sw = np.ones((len(df), 1)) if w is None else np.sqrt(w)[:, None]
        exact = x - d @ np.linalg.lstsq(d * sw, x * sw, rcond=None)[0]
        eager = Absorber(df, terms, weights=w, tolerance=1e-14, direct_at_once=True)
        calls.clear()
        got = eager.demean(x)
        assert calls == ["jump"] * 3 and np.all(got.iterations == 1) and np.all(got.converged)
        assert np.max(np.abs(got.values - exact)) <= 1e-11 * np.max(np.abs(x))
        assert Absorber(df, terms, weights=w, tolerance=1e-14).demean(x).iterations.max() == DIRECT_AFTER + 1
        assert eager.reweighted(np.ones(len(df)))._direct_layout is eager._direct_layout


# ---- shortcuts of the engine's fast paths give the plain computation's numbers ------------------

def test_codes_by_counting_equal_pandas_sorted_factorize() -> None:
    """Source: pandas.factorize(sort=True) on the same columns (the general-purpose reference).
    Integer columns whose range is small are coded by counting, not sorting; the codes must be the
    sorted ones, for signed, unsigned and narrow integers near the ends of their range, text, and
    combinations of columns; nullable integers (missing values coded -1) take pandas' path."""
    rng = np.random.default_rng(20261202)
    for trial in range(60):
        n = int(rng.integers(1, 400))
        frame = pd.DataFrame({
            "small": rng.integers(-5, 20, n),
            "wide": rng.integers(0, 10 ** int(rng.integers(1, 12)), n).astype(np.uint64 if trial % 2 else np.int64),
            "text": rng.choice(["north", "south", "east"], n),
            "narrow": rng.integers(-100, 101, n).astype(np.int8),
            "low_end": np.int64(-2**63) + rng.integers(0, 50, n),
            "high_end": np.uint64(2**64 - 60) + rng.integers(0, 50, n).astype(np.uint64),
            "nullable": pd.array(np.where(rng.random(n) < 0.1, None, rng.integers(0, 9, n)), dtype="Int64"),
        })
        for columns in [("small",), ("wide",), ("text",), ("narrow",), ("low_end",), ("high_end",), ("nullable",),
                        ("small", "wide"), ("small", "text", "narrow"), ("low_end", "narrow")]:
            codes, n_levels = factorize(frame, columns)
            key = (frame[columns[0]] if len(columns) == 1
                   else pd.MultiIndex.from_frame(frame[list(columns)]).to_flat_index())
            expected, uniques = pd.factorize(key, sort=True)
            assert codes.dtype == np.int64
            assert n_levels == len(uniques) and np.array_equal(codes, expected), (trial, columns)


def test_cluster_sums_of_sorted_codes_equal_the_unsorted_path(wage_panel: pd.DataFrame) -> None:
    """Source: linearmodels' wage_panel, clustered by worker, fitted sorted by worker (sums over runs
    of rows) and shuffled (sums by group counts): the same estimate and SE to rounding."""
    sorted_rows = wage_panel.sort_values(["nr", "year"]).reset_index(drop=True)
    shuffled = sorted_rows.sample(frac=1.0, random_state=7).reset_index(drop=True)
    codes = pd.factorize(sorted_rows["nr"], sort=True)[0]
    values = np.random.default_rng(3).normal(size=(len(codes), 3))
    runs, g = cluster_sums(values, codes)
    order = np.random.default_rng(4).permutation(len(codes))
    groups, g2 = cluster_sums(values[order], codes[order])
    assert g == g2 == wage_panel["nr"].nunique()
    assert np.allclose(runs, groups, rtol=1e-12, atol=1e-12)
    for kind, by in [("clustered", (("nr",),)), ("two_way_clustered", (("nr",), ("year",)))]:
        fits = [fit_one(frame, "lwage", "union", controls=["hours", "married"], absorb=parse_absorb(["nr", "year"]),
                        inference=Inference(kind, by)) for frame in (sorted_rows, shuffled)]
        assert fits[0].status == fits[1].status == "ok"
        assert fits[0].estimate == pytest.approx(fits[1].estimate, rel=1e-10)
        assert fits[0].std_error == pytest.approx(fits[1].std_error, rel=1e-10)


def test_cluster_sums_over_runs_equal_plain_group_sums(wage_panel: pd.DataFrame) -> None:
    """Source: numpy's bincount per column (the plain computation). Clusters holding whole workers
    (worker number modulo 37), rows sorted by worker: the sums run over each worker's rows first,
    then over the groups. Clusters by year in the balanced panel sorted by worker and year cycle through
    the years: the cycles are added in row order, the same bytes as bincount's (C and Fortran order, one
    column); less one row, they take the plain path. Each codes array's layout is kept while the array
    lives and dropped with it."""
    sorted_rows = wage_panel.sort_values(["nr", "year"]).reset_index(drop=True)
    for column, rows in [("group", sorted_rows), ("year", sorted_rows), ("year", sorted_rows.iloc[1:])]:
        values = np.random.default_rng(5).normal(size=(len(rows), 4))
        key = rows["nr"] % 37 if column == "group" else rows["year"]
        codes = pd.factorize(key, sort=True)[0]
        g = int(codes.max()) + 1
        plain = np.column_stack([np.bincount(codes, values[:, j], minlength=g) for j in range(4)])
        sums, got_g = cluster_sums(values, codes)
        assert got_g == g and np.allclose(sums, plain, rtol=1e-12, atol=1e-12), column
        one, _ = cluster_sums(values[:, 0], codes)
        assert np.allclose(one, plain[:, 0], rtol=1e-12, atol=1e-12), column
        layout = covariance._layout(codes)
        assert (layout.run_starts is not None) == (column == "group")
        assert layout.cycling == (column == "year" and len(rows) == len(sorted_rows))
        if layout.cycling:
            assert cluster_sums(np.asfortranarray(values), codes)[0].tobytes() == plain.tobytes()
            assert cluster_sums(np.ascontiguousarray(values), codes)[0].tobytes() == plain.tobytes()
            assert one.tobytes() == plain[:, 0].tobytes()
        key_id = id(codes)
        assert key_id in covariance._LAYOUTS
        del codes
        assert key_id not in covariance._LAYOUTS


def test_covariance_conventions_take_numbers_and_arrays_of_draws_alike() -> None:
    """The small-sample conventions' one home (covariance.py) serves the engine (numbers) and the
    batched draws (arrays, one entry per draw): each draw's entry equals the number computed alone, and
    the factors are those stated in the module docstring (Cameron & Miller 2015 for the clustered one)."""
    rng = np.random.default_rng(11)
    d, k = 5, 3
    n = rng.integers(40, 60, size=d).astype(float)
    groups = rng.integers(2, 9, size=d).astype(float)
    absorbed, nested = rng.integers(1, 6, size=d).astype(float), rng.integers(0, 2, size=d).astype(float)
    totals = rng.normal(size=(d, k, k))
    for kind in covariance.COVARIANCE_KINDS.values():
        dof = kind.residual_df(n, 2, absorbed, nested)
        stacked = kind.scaled(totals, n, dof, groups)
        df = kind.inference_df(dof, [groups, groups + 1])
        for i in range(d):
            one = kind.residual_df(n[i], 2, absorbed[i], nested[i])
            assert one == dof[i]
            assert np.array_equal(stacked[i], kind.scaled(totals[i], n[i], one, groups[i]))
            assert df[i] == kind.inference_df(one, [groups[i], groups[i] + 1])
        i = 0
        expected = {"homoskedastic": 1 / (n[i] - 2 - absorbed[i]), "hc1": n[i] / (n[i] - 2 - absorbed[i]),
                    "clustered": groups[i] / (groups[i] - 1) * (n[i] - 1) / (n[i] - 2 - absorbed[i] + nested[i])}
        expected["two_way_clustered"] = expected["clustered"]
        assert kind.scaled(1.0, n[i], dof[i], groups[i]) == pytest.approx(expected[kind.name], rel=1e-14)
    v = rng.normal(size=(d, k, k))
    v = v @ v.transpose(0, 2, 1) - 2.0 * np.eye(k)  # some with negative eigenvalues
    clipped, changed = covariance.clip_negative(v)
    for i in range(d):
        alone, flag = covariance.clip_negative(v[i])
        assert flag == changed[i] and np.allclose(alone, clipped[i], rtol=1e-12, atol=1e-12)
        assert np.linalg.eigvalsh(clipped[i]).min() >= -1e-12


def test_a_result_updated_in_place_of_replace_equals_replace() -> None:
    """The engine's fast copy of a SpecResult with changes (no ``__init__``) gives what
    ``dataclasses.replace`` gives (the standard library's own copy), leaves the original as it was, and
    refuses a field the result does not have."""
    from dataclasses import fields, replace

    from fegrid.estimate import SpecResult, _updated

    base = SpecResult("s", "ok", message="m", estimate=1.5, n_obs=10, clusters="unit=4")
    names = [f.name for f in fields(SpecResult)]

    def same(a: SpecResult, b: SpecResult) -> bool:  # field by field, NaN equal to NaN (as Python 3.13 compares)
        return all(x == y or (x != x and y != y) for x, y in ((getattr(a, n), getattr(b, n)) for n in names))
    rng = np.random.default_rng(3)
    for _ in range(20):
        chosen = rng.choice(names, size=3, replace=False)
        changes = {n: (getattr(base, n) if n == "spec_id" else type(getattr(base, n))()) for n in chosen}
        assert same(_updated(base, **changes), replace(base, **changes))
    assert same(base, SpecResult("s", "ok", message="m", estimate=1.5, n_obs=10, clusters="unit=4"))
    with pytest.raises(TypeError):
        _updated(base, not_a_field=1)


def test_a_fitted_block_leaves_no_design_alive(monkeypatch, wage_panel: pd.DataFrame) -> None:
    """A block's designs (each holding its demeaned columns, n x m) are freed when the block is done,
    without waiting for Python's cycle collector: before, a residual closure referred back to its
    design, and a 1,000,000-row grid held every design of a block at once (2.1 GB traced, 0.6 GB now)."""
    alive: list[weakref.ref] = []
    init = estimate._Design.__init__

    def recording(self, *args, **kwargs) -> None:
        init(self, *args, **kwargs)
        alive.append(weakref.ref(self))

    monkeypatch.setattr(estimate._Design, "__init__", recording)
    specs = [SpecRequest(f"s{i}", "lwage", "union", controls, Inference(kind, by))
             for i, (controls, (kind, by)) in enumerate(
                 (c, k) for c in [(), ("hours",), ("hours", "married")]
                 for k in [("clustered", (("nr",),)), ("two_way_clustered", (("nr",), ("year",))), ("hc1", ())])]
    frame = wage_panel.assign(hours=wage_panel["hours"].where(wage_panel["year"] != 1985))  # two designs
    gc.disable()
    try:
        fit = fit_block(frame, BlockSettings(absorb=parse_absorb(["nr", "year"])), specs)
        assert len(alive) == fit.designs == 2
        assert all(ref() is None for ref in alive)
    finally:
        gc.enable()
    assert all(r.status == "ok" for r in fit.results) and len(fit.coefficients) == len(specs)


def test_job_processes_ask_the_allocator_to_reuse_freed_memory() -> None:
    """fegrid.memory: on Linux with glibc the job processes' allocator setting applies."""
    import platform

    applied = reuse_freed_memory()
    assert applied == (sys.platform.startswith("linux") and platform.libc_ver()[0] == "glibc")


def test_a_reweighted_absorber_equals_a_new_one(wage_panel: pd.DataFrame) -> None:
    """Absorber.reweighted (each IRLS step of Poisson PML) reuses what does not depend on the weights;
    its demeaned columns and absorbed df are exactly those of a new absorber with the same weights,
    for a trend term, a redundant term and two terms that take the direct solver (linearmodels'
    wage_panel)."""
    df = _unbalanced(wage_panel).assign(t=lambda d: d["year"] - 1980.0, group=lambda d: d["nr"] % 7)
    x = df[["lwage", "hours", "union"]].to_numpy(dtype=float)
    rng = np.random.default_rng(11)
    for terms in [parse_absorb(["nr", "year"]), (TrendTerm("nr"), EffectTerm(("year",))),
                  parse_absorb(["nr", "group", "year"])]:
        first = Absorber(df, terms, weights=rng.uniform(0.5, 2.0, len(df)), time="t", tolerance=1e-12)
        first.demean(x)  # caches the direct solver of the first weights, which the next must not reuse
        for _ in range(2):
            w = rng.uniform(0.5, 2.0, len(df))
            again = first.reweighted(w)
            fresh = Absorber(df, terms, weights=w, time="t", tolerance=1e-12)
            got, want = again.demean(x), fresh.demean(x)
            assert np.array_equal(got.values, want.values) and np.array_equal(got.iterations, want.iterations)
            assert again.absorbed_df == fresh.absorbed_df
            first = again


def test_components_shortcut_equals_scipy_on_random_graphs() -> None:
    """Source: scipy.sparse.csgraph.connected_components (the general-purpose reference) on the same
    bipartite graphs. The shortcut answers 1 when one level meets every level of the other term and
    every level has a row; graphs with a hub, without one, split in parts, and with a level that has
    no row (its own component) must all count as scipy counts them."""
    import scipy.sparse as sp
    from scipy.sparse.csgraph import connected_components

    from fegrid.absorb import _components

    rng = np.random.default_rng(20261203)
    hubs = 0
    for trial in range(300):
        la, lb = int(rng.integers(1, 40)), int(rng.integers(1, 15))
        pairs = [(a, b) for a in range(la) for b in range(lb) if rng.random() < (0.9 if trial % 3 else 0.15)]
        if trial % 4 == 0:  # a hub: level 0 of the second term meets every level of the first
            pairs += [(a, 0) for a in range(la)]
        if trial % 5 == 0 and la > 2:  # a level of the first term without rows
            pairs = [p for p in pairs if p[0] != la - 1]
        if not pairs:
            continue
        a, b = (np.array(x, dtype=np.int64) for x in zip(*pairs))
        graph = sp.coo_array((np.ones(len(a)), (a, b + la)), shape=(la + lb, la + lb))
        expected = int(connected_components(graph, directed=False)[0])
        assert _components(a, la, b, lb) == expected, trial
        hubs += expected == 1
    assert hubs > 50  # the shortcut's case was met


def test_batched_pseudo_inverses_are_the_one_at_a_time_bytes() -> None:
    """The systems of a region's periods (one per region, several of each size) are inverted in one
    batched eigendecomposition per size: the same bytes as one at a time, rank-deficient ones too."""
    from fegrid.absorb import _pinv, _pinv_many

    rng = np.random.default_rng(7)
    grams = []
    for size in [4, 4, 6, 1, 4, 6, 9]:
        a = rng.normal(size=(size, size))
        g = a @ a.T
        g[-1, :] = g[:, -1] = 0.0  # singular, as a part's dummies summing to a constant make it
        grams.append(g)
    for g, got in zip(grams, _pinv_many(grams)):
        assert np.array_equal(_pinv(g), got)


@pytest.mark.parametrize("trend", [False, True])
def test_direct_solver_fills_its_systems_by_counting_cell_pairs_with_the_sparse_products_bytes(
        trend: bool, monkeypatch) -> None:
    """The two-term direct solver (units, and period effects within regions: one system per region) fills
    each region's system from the products of pairs of a unit's cells, summed group after group as the
    sparse matrix product sums them: the same bytes as the sparse product (the fallback for too many
    pairs), weighted and reweighted; a reweighted absorber (a Poisson step) reuses the cells and pairs."""
    from fegrid import absorb

    rng = np.random.default_rng(5)
    n_units, n_regions, n_periods = 400, 25, 9
    unit = np.repeat(np.arange(n_units), n_periods)
    period = np.tile(np.arange(n_periods), n_units)
    keep = rng.random(len(unit)) < 0.85
    unit, period = np.unique(unit[keep], return_inverse=True)[1], period[keep]
    region_period = np.unique((unit % n_regions) * n_periods + period, return_inverse=True)[1]
    codes = {("unit",): unit, ("region_period",): region_period}
    terms = (TrendTerm("unit") if trend else EffectTerm(("unit",)), EffectTerm(("region_period",)))
    x = rng.normal(size=(len(unit), 3)) + period[:, None] * 0.2
    w = rng.uniform(0.5, 2.0, len(unit))

    def demeaned() -> list[np.ndarray]:
        a = Absorber(len(unit), terms, weights=w, time="period", time_values=period.astype(float),
                     tolerance=1e-12, max_iterations=2000, codes_of=codes.__getitem__)
        assert a._direct_setup is not None and not a._direct_layout.dense  # one system per region
        b = a.reweighted(rng.uniform(0.5, 1.5, len(unit)))
        assert b._direct_layout is a._direct_layout
        used.append(a._direct_layout.pair_entry is not None)
        return [a.demean(x).values, b.demean(x).values, a._direct.apply(np.asfortranarray(x))]

    used: list[bool] = []
    state = rng.bit_generator.state
    by_pairs = demeaned()
    rng.bit_generator.state = state
    monkeypatch.setattr(absorb, "MAX_PAIRS", 0)  # the sparse product
    by_product = demeaned()
    assert used == [True, False]
    for got, expected in zip(by_pairs, by_product):
        assert got.tobytes() == expected.tobytes()


def test_codes_on_a_subset_equal_a_factorization_of_the_subset(wage_panel: pd.DataFrame) -> None:
    """Source: factorize on the subset itself (pandas.factorize(sort=True) underneath). A Poisson fit
    renumbers its design's codes on the rows it keeps instead of factorizing them again."""
    from fegrid.absorb import LevelCodes, codes_on_rows

    rng = np.random.default_rng(3)
    frame = wage_panel.assign(region=lambda d: (d["nr"] % 7).astype(str))
    codes_of = LevelCodes(frame)
    for _ in range(20):
        positions = np.flatnonzero(rng.random(len(frame)) < rng.uniform(0.05, 0.9))
        subset = codes_on_rows(codes_of, positions)
        for columns in [("nr",), ("year",), ("region",), ("region", "year"), ("nr", "year")]:
            assert np.array_equal(subset(columns), factorize(frame.iloc[positions], columns)[0]), columns


def test_an_absorber_on_a_row_count_equals_one_on_the_frame(wage_panel: pd.DataFrame) -> None:
    """The joint tests' draws build absorbers from codes and a row count, without a frame: the same
    demeaned bytes, absorbed df and nested df, with unit trends (which read the time column) too."""
    from fegrid.absorb import LevelCodes, float_columns

    terms = parse_absorb(["nr", "year", {"trend": "nr"}])
    codes_of = LevelCodes(wage_panel)
    on_frame = Absorber(wage_panel, terms, time="year", codes_of=codes_of)
    on_count = Absorber(len(wage_panel), terms, time="year", codes_of=codes_of,
                        time_values=wage_panel["year"].to_numpy(dtype=float))
    x = float_columns(wage_panel, ["lwage", "hours", "exper"])
    assert np.array_equal(x, wage_panel[["lwage", "hours", "exper"]].to_numpy(dtype=float))
    assert np.array_equal(on_frame.demean(x).values, on_count.demean(x).values)
    assert on_frame.absorbed_df == on_count.absorbed_df
    unit = codes_of(("nr",))
    assert on_frame.nested_df([unit]) == on_count.nested_df([unit]) > 0
    with pytest.raises(ValueError, match="codes_of"):
        Absorber(len(wage_panel), terms, time="year")


@pytest.mark.parametrize("unbalanced", [False, True])
def test_indicators_demeaned_on_a_table_of_cells_equal_the_dummy_regression(wage_panel: pd.DataFrame,
                                                                            unbalanced: bool) -> None:
    """Indicators of cohort and relative year (cohort: the year a worker is first a union member, in
    linearmodels' wage_panel) demeaned on the table of (class of alike workers, year) cells equal the
    residuals of a regression on explicit worker and year dummies (numpy's least squares) to 1e-10, and
    the alternating projections on every row to their tolerance; unbalanced: 1983 dropped for every third
    worker, so that workers of one cohort fall into two classes. Where rows of alike workers differ (a
    column of hours), under unequal weights or with a third term, the table does not apply."""
    df = wage_panel[~((wage_panel["nr"] % 3 == 0) & (wage_panel["year"] == 1983))] if unbalanced else wage_panel
    df = df.reset_index(drop=True)
    cohort = df["nr"].map(df[df["union"] == 1].groupby("nr")["year"].min()).fillna(0).to_numpy()
    rel = np.where(cohort > 0, df["year"].to_numpy() - cohort, -99)
    x = np.column_stack([rel == k for k in range(-3, 4)] + [rel >= 4]).astype(float)
    absorber = Absorber(df, parse_absorb(["nr", "year"]))
    got = absorber.demean_cells(x)
    assert got is not None and got.converged.all()
    dummies = np.column_stack([pd.get_dummies(df["nr"]).to_numpy(dtype=float),
                               pd.get_dummies(df["year"]).to_numpy(dtype=float)[:, 1:]])
    reference = x - dummies @ np.linalg.lstsq(dummies, x, rcond=None)[0]
    np.testing.assert_allclose(got.values, reference, rtol=0, atol=1e-10)
    np.testing.assert_allclose(got.values, absorber.demean(x).values, rtol=0, atol=1e-6)
    assert absorber.demean_cells(np.column_stack([x, df["hours"].to_numpy(dtype=float)])) is None
    weighted = Absorber(df, parse_absorb(["nr", "year"]), weights=df["hours"].to_numpy(dtype=float))
    assert weighted.demean_cells(x) is None
    assert Absorber(df, parse_absorb(["nr", "year", "occupation"])).demean_cells(x) is None


def test_kept_run_sums_serve_every_clustering_with_the_same_bytes(wage_panel: pd.DataFrame) -> None:
    """Source: linearmodels' wage_panel sorted by worker, clustered by worker and by groups of whole workers
    (the workers' ranks modulo 37, so that neighbours differ): each worker's rows are one run of its group,
    so the group sums start from the worker sums. A regression's kept sums (scores and ``h e``, either
    clustering asked first) equal the sums computed alone, byte for byte, and the rows are summed over once
    per kind of values."""
    from fegrid.covariance import FitPieces

    rows = wage_panel.sort_values(["nr", "year"]).reset_index(drop=True)
    worker = pd.factorize(rows["nr"], sort=True)[0]
    group = worker % 37
    assert covariance._layout(group).run_starts is not None
    x = np.asfortranarray(rows[["union", "hours", "married"]].to_numpy(dtype=float))
    e = rows["lwage"].to_numpy(dtype=float) - rows["lwage"].mean()
    h = x @ np.array([0.3, -0.2, 0.1])
    scores = np.asfortranarray(x * e[:, None])
    for order in ((worker, group), (group, worker)):
        fit = FitPieces(estimate=0.0, e=e, h=h, rss=float(e @ e), bread=np.eye(3), within_r2=float("nan"),
                        scores=lambda: scores)
        for codes in order:
            assert fit.score_sums(codes)[0].tobytes() == cluster_sums(scores, codes)[0].tobytes()
            assert fit.he_sums(codes)[0].tobytes() == cluster_sums(h * e, codes)[0].tobytes()
        assert sorted(ndim for ndim, _, _ in fit._runs) == [1, 2]  # one pass over the rows per kind of values


@pytest.mark.parametrize("chunk", [53, 64, 16384])
def test_sums_taken_in_one_pass_equal_the_plain_sums(wage_panel: pd.DataFrame, chunk: int, monkeypatch) -> None:
    """Source: numpy (the plain computation: residuals ``Z w``, scores ``X e``, per-cluster sums by bincount,
    then ``U'U``). linearmodels' wage_panel sorted by worker and year: clusters by worker (runs of rows), by
    groups of whole workers (runs of a group), by year (cycles), by occupation (neither: summed by codes), by
    worker and year (one row each) and by row. Chunks of 53 rows cut runs and cycles anywhere, 64 rows are
    whole cycles of 8 years, 16384 rows one chunk. Each clustering's numbers do not depend on the others
    asked for, and the focal variance's sums are the same bytes with or without the scores."""
    monkeypatch.setattr(covariance, "FUSED_CHUNK", chunk)
    rows = wage_panel.sort_values(["nr", "year"]).reset_index(drop=True)
    worker = pd.factorize(rows["nr"], sort=True)[0]
    by = {"worker": worker, "group": worker % 37, "year": pd.factorize(rows["year"], sort=True)[0],
          "occupation": pd.factorize(rows["occupation"], sort=True)[0], "cell": np.arange(len(rows)), "row": None}
    assert covariance._layout(by["worker"]).starts is not None
    assert covariance._layout(by["group"]).run_starts is not None
    assert covariance._layout(by["year"]).cycling
    z = np.asfortranarray(rows[["lwage", "union", "hours", "married", "exper"]].to_numpy(dtype=float))
    z -= z.mean(axis=0)
    weights = np.zeros((5, 2))
    weights[:, 0] = [1.0, -0.1, 0.002, -0.05, 0.0]  # exper out of the regression: its weights are zero
    weights[1:4, 1] = [0.4, -0.3, 0.2]
    columns = [1, 2, 3]
    eh, crosses = covariance.fused_fit(z, weights, columns, list(by.values()), scores=True)
    np.testing.assert_allclose(eh, z @ weights, rtol=1e-13, atol=1e-13)
    e, he = eh[:, 0], eh[:, 1] * eh[:, 0]
    scores = z[:, columns] * e[:, None]
    for name, codes in by.items():
        got = crosses[-1 if codes is None else id(codes)]
        g = len(rows) if codes is None else int(codes.max()) + 1
        u = scores if codes is None else np.column_stack([np.bincount(codes, scores[:, j], minlength=g)
                                                          for j in range(3)])
        v = he if codes is None else np.bincount(codes, he, minlength=g)
        assert got.codes is codes and got.n_groups == g, name
        np.testing.assert_allclose(got.scores, u.T @ u, rtol=1e-11, err_msg=name)
        assert got.he == pytest.approx(float(v @ v), rel=1e-11), name
        _, alone = covariance.fused_fit(z, weights, columns, [codes], scores=True)
        assert alone[-1 if codes is None else id(codes)].scores.tobytes() == got.scores.tobytes(), name
        _, focal_only = covariance.fused_fit(z, weights, columns, [codes], scores=False)
        kept = focal_only[-1 if codes is None else id(codes)]
        assert kept.scores is None and kept.he == got.he, name


def test_fitted_pieces_with_sums_taken_ahead_give_the_same_matrices(wage_panel: pd.DataFrame, monkeypatch) -> None:
    """Source: linearmodels' wage_panel, worker and year effects, clustered by worker, by year, by both and
    robust: fit_block's results with each regression's sums taken in one pass (in chunks of 53 rows)
    equal those summed per covariance choice from the whole scores (every covariance matrix to 1e-10)."""
    rows = wage_panel.sort_values(["nr", "year"]).reset_index(drop=True)
    specs = [SpecRequest(f"{c}-{kind}-{len(by)}", "lwage", "union", controls, Inference(kind, by))
             for c, controls in (("none", ()), ("two", ("hours", "married")))
             for kind, by in (("clustered", (("nr",),)), ("clustered", (("year",),)), ("hc1", ()),
                              ("two_way_clustered", (("nr",), ("year",))))]
    settings = BlockSettings(absorb=parse_absorb(["nr", "year"]))
    ahead = fit_block(rows, settings, specs)
    monkeypatch.setattr(covariance, "FUSED_CHUNK", 53)
    chunked = fit_block(rows, settings, specs)
    monkeypatch.setattr(estimate, "_clusterings", lambda design, specs: {})  # nothing ahead: summed when asked
    asked = fit_block(rows, settings, specs)
    for a, c, b in zip(ahead.results, chunked.results, asked.results):
        assert a.status == b.status == c.status == "ok", (a.message, b.message)
        for x in (a, c):
            assert x.estimate == b.estimate
            assert x.std_error == pytest.approx(b.std_error, rel=1e-12)
        for x in (ahead, chunked):
            np.testing.assert_allclose(x.coefficients[a.spec_id].covariance, asked.coefficients[a.spec_id].covariance,
                                       rtol=1e-10, atol=0)


def test_combined_level_codes_equal_a_factorization_of_the_combination(wage_panel: pd.DataFrame) -> None:
    """Source: linearmodels' wage_panel, with occupation as text and a few missing ones; pandas' sorted
    factorization of the combined levels. A frame's codes of a column combination are built from each
    column's codes (factorized once for every combination they enter) and equal the combination's own."""
    from fegrid.absorb import LevelCodes, factorize

    frame = wage_panel.assign(job=wage_panel["occupation"].map(lambda v: f"job {v:02d}"))
    for columns in (("nr", "year"), ("job", "year"), ("year", "job", "married")):
        codes = LevelCodes(frame)(columns)
        assert np.array_equal(codes, factorize(frame, columns)[0]), columns
        keys = pd.Series(list(zip(*(frame[c] for c in columns))))
        assert np.array_equal(codes, pd.factorize(keys, sort=True)[0]), columns


def test_nesting_is_decided_the_same_with_or_without_the_first_rows_probe() -> None:
    """Source: the definition (every level of the inner codes within one level of the outer), counted by pandas.
    Long code arrays (more rows than the probe looks at first) that nest, and that fail to nest inside the
    probed rows or only after them."""
    from fegrid.absorb import NESTED_PROBE_ROWS, _nested

    n = 5 * NESTED_PROBE_ROWS
    inner = np.arange(n) // 10
    outer = inner // 7
    cases = {"nested": outer, "split early": outer.copy(), "split late": outer.copy()}
    cases["split early"][100] += 1
    cases["split late"][4 * NESTED_PROBE_ROWS + 3] += 1
    for name, out in cases.items():
        by_definition = bool(pd.Series(out).groupby(inner).nunique().max() == 1)
        assert by_definition == (name == "nested"), name
        assert _nested(inner, out) == by_definition, name
    assert _nested(inner, inner)
