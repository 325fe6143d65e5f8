"""Wild cluster restricted bootstrap: brute force with linearmodels, Monte Carlo size, reproducibility."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest

from fegrid.absorb import parse_absorb
from fegrid.estimate import BlockSettings, Inference, SpecRequest, fit_block, fit_one
from fegrid.wild import WildBootstrap, wild_weights

CLUSTER = (("firm",),)


@pytest.fixture(scope="module")
def eight_firms(grunfeld: pd.DataFrame) -> pd.DataFrame:
    """statsmodels' Grunfeld data, the first 8 firms in alphabetical order: G = 8, 2^8 = 256 draws."""
    return grunfeld[grunfeld["firm"].isin(sorted(grunfeld["firm"].unique())[:8])].reset_index(drop=True)


def test_enumerated_rademacher_equals_brute_force_with_linearmodels(eight_firms: pd.DataFrame) -> None:
    """Source: linearmodels PanelOLS refitted on every one of the 2^8 Rademacher draws.

    Brute force, as Cameron, Gelbach & Miller (2008) describe it: fit the restricted model (no
    `value`), build y* = fitted + effects + v_firm * residuals for each sign vector, refit the full
    model with firm effects and firm-clustered SEs (debiased, group_debias: the same small-sample
    factor as fegrid's), and count |t*| >= |t|. Firm effects are nested in the firm clusters, so
    bootstrapping in the demeaned space (fegrid) and in levels (here) are the same.
    """
    from linearmodels import PanelOLS

    boot = WildBootstrap(draws=999, weights="rademacher", interval=False)
    ours = fit_one(eight_firms, "invest", "value", controls=["capital"], absorb=parse_absorb(["firm"]),
                   inference=Inference("clustered", CLUSTER, boot))
    assert ours.wild_enumerated and ours.wild_draws == 256

    panel = eight_firms.set_index(["firm", "year"])
    fit_kw = {"cov_type": "clustered", "cluster_entity": True, "debiased": True, "group_debias": True}
    full = PanelOLS(panel["invest"], panel[["value", "capital"]], entity_effects=True).fit(**fit_kw)
    t_obs = full.params["value"] / full.std_errors["value"]
    assert ours.t_stat == pytest.approx(t_obs, rel=1e-8)
    restricted = PanelOLS(panel["invest"], panel[["capital"]], entity_effects=True).fit()
    base = restricted.fitted_values["fitted_values"] + restricted.estimated_effects["estimated_effects"]
    firms = sorted(eight_firms["firm"].unique())
    firm_of = panel.index.get_level_values("firm").map({f: i for i, f in enumerate(firms)}).to_numpy()
    t_star = []
    for signs in itertools.product((-1.0, 1.0), repeat=len(firms)):
        y_star = base + np.asarray(signs)[firm_of] * restricted.resids
        res = PanelOLS(y_star, panel[["value", "capital"]], entity_effects=True).fit(**fit_kw)
        t_star.append(res.params["value"] / res.std_errors["value"])
    brute = float(np.mean(np.abs(np.asarray(t_star)) >= abs(t_obs) - 1e-9))
    assert ours.wild_p_value == pytest.approx(brute, abs=1e-12)


def _dummy_design(frame: pd.DataFrame, regressors: list[str], effects: list[str]) -> np.ndarray:
    """Regressors, a constant and explicit dummy columns (first level dropped) for each effect."""
    parts = [frame[regressors].to_numpy(dtype=float), np.ones((len(frame), 1))]
    for col in effects:
        parts.append(pd.get_dummies(frame[col], drop_first=True).to_numpy(dtype=float))
    return np.column_stack(parts)


def _brute_force_t(frame: pd.DataFrame, *, focal: str, controls: list[str], effects: list[str], cluster: str,
                   weights: str | None, beta0: float, signs: np.ndarray) -> tuple[float, np.ndarray]:
    """Observed and bootstrap t statistics of ``focal = beta0``, every draw refitted in full.

    Restricted model: ``y - beta0 x`` on the controls and explicit dummies (weighted least squares
    when weighted); each draw rebuilds ``y* = beta0 x + fitted + v_cluster * residuals`` in levels and
    refits the whole dummy-variable model. The clustered variance is ``sum_g (sum_{i in g} h_i e_i)^2``
    without a small-sample factor: a constant factor scales the observed and every bootstrap t
    alike, so the p-value does not depend on it.
    """
    y = frame["invest"].to_numpy(dtype=float)
    x = frame[focal].to_numpy(dtype=float)
    sw = np.sqrt(frame[weights].to_numpy(dtype=float)) if weights else np.ones(len(frame))
    full = _dummy_design(frame, [focal, *controls], effects) * sw[:, None]
    restricted = _dummy_design(frame, controls, effects) * sw[:, None]
    ys = (y - beta0 * x) * sw
    gamma = np.linalg.lstsq(restricted, ys, rcond=None)[0]
    fitted, resid = restricted @ gamma, ys - restricted @ gamma
    codes = pd.factorize(frame[cluster], sort=True)[0]
    h = np.linalg.pinv(full)[0]  # the focal row of (X'X)^-1 X', by SVD (not normal equations)

    def t_stats(ymat: np.ndarray) -> np.ndarray:
        beta = np.linalg.lstsq(full, ymat, rcond=None)[0]
        e = ymat - full @ beta
        sums = np.vstack([np.sum((h[:, None] * e)[codes == g], axis=0) for g in range(codes.max() + 1)])
        return (beta[0] - beta0) / np.sqrt(np.sum(sums**2, axis=0))

    t_obs = float(t_stats((y * sw)[:, None])[0])
    y_star = (beta0 * x * sw + fitted)[:, None] + signs[:, codes].T * resid[:, None]
    return t_obs, t_stats(y_star)


_BRUTE_CASES = {
    # name: (effects, cluster, controls, weights)
    "nested-firm-in-firm": (["firm"], "firm", ["capital"], None),
    "nested-no-controls": (["firm"], "firm", [], None),
    "firm-year-by-firm": (["firm", "year"], "firm", ["capital"], None),
    "firm-by-period": (["firm"], "period", ["capital"], None),
    "pooled-by-firm": ([], "firm", ["capital"], None),
    "firm-year-by-firm-weighted": (["firm", "year"], "firm", [], "capital"),
}


@pytest.mark.parametrize("case", sorted(_BRUTE_CASES))
def test_wild_bootstrap_equals_brute_force_refits_with_dummies(eight_firms: pd.DataFrame, case: str) -> None:
    """Source: brute force — every Rademacher sign vector refitted as a dummy-variable regression
    (numpy least squares on explicit dummy columns; the observed t is checked against statsmodels'
    OLS/WLS with cluster-robust errors, a general-purpose reference library).

    Covers absorbed effects nested in the clusters, effects that cross them (year effects under firm
    clusters, firm effects under clusters of consecutive years, the intercept of pooled OLS), weights,
    and no controls. The p-value must equal the brute force's, and the test-inversion interval's
    bounds must be where the brute-force p-value crosses alpha.
    """
    import statsmodels.api as sm

    effects, cluster, controls, weights = _BRUTE_CASES[case]
    # clusters of consecutive years (a grouping of statsmodels' Grunfeld years: 1935-37, 1938-40, ...)
    frame = eight_firms.assign(period=(eight_firms["year"] - 1935) // 3)
    n_groups = frame[cluster].nunique()
    boot = WildBootstrap(draws=999, weights="rademacher")
    ours = fit_one(frame, "invest", "value", controls=controls, absorb=parse_absorb(effects),
                   inference=Inference("clustered", ((cluster,),), boot), weights=weights,
                   keep_singletons=True)
    assert ours.wild_enumerated and ours.wild_draws == 2**n_groups
    signs, _ = wild_weights(boot, n_groups, "unused: every sign vector is enumerated")
    kw = {"focal": "value", "controls": controls, "effects": effects, "cluster": cluster, "weights": weights,
          "signs": signs}

    design = _dummy_design(frame, ["value", *controls], effects)
    model = (sm.WLS(frame["invest"], design, weights=frame[weights]) if weights else sm.OLS(frame["invest"], design))
    ref = model.fit(cov_type="cluster", cov_kwds={"groups": pd.factorize(frame[cluster])[0]})
    assert ours.estimate == pytest.approx(ref.params.iloc[0], rel=1e-9)
    t_obs, t_star = _brute_force_t(frame, beta0=0.0, **kw)
    # statsmodels scales the clustered variance by G/(G-1) (N-1)/(N-K), K the design's rank
    n, rank = len(frame), np.linalg.matrix_rank(design)
    factor = n_groups / (n_groups - 1) * (n - 1) / (n - rank)
    assert t_obs == pytest.approx(ref.tvalues.iloc[0] * np.sqrt(factor), rel=1e-8)
    brute_p = float(np.mean(np.abs(t_star) >= abs(t_obs) - 1e-8 * max(1.0, abs(t_obs))))
    assert ours.wild_p_value == pytest.approx(brute_p, abs=1e-12), (ours.wild_p_value, brute_p)

    def brute_p_at(beta0: float) -> float:
        t0, ts = _brute_force_t(frame, beta0=beta0, **kw)
        return float(np.mean(np.abs(ts) >= abs(t0) - 1e-8 * max(1.0, abs(t0))))

    alpha = 0.05
    step = 1e-4 * ours.std_error
    assert brute_p_at(ours.wild_ci_low - step) <= alpha < brute_p_at(ours.wild_ci_low + step)
    assert brute_p_at(ours.wild_ci_high + step) <= alpha < brute_p_at(ours.wild_ci_high - step)


def test_interval_by_test_inversion_brackets_the_estimate(eight_firms: pd.DataFrame) -> None:
    res = fit_one(eight_firms, "invest", "value", controls=["capital"], absorb=parse_absorb(["firm"]),
                  inference=Inference("clustered", CLUSTER, WildBootstrap(draws=999, weights="webb", seed=3)))
    assert res.wild_ci_low < res.estimate < res.wild_ci_high
    # with few clusters the bootstrap interval is wider than the t(G-1) one (common practice)
    assert res.wild_ci_high - res.wild_ci_low > 0.5 * (res.ci_high - res.ci_low)


def test_reproducible_and_independent_of_blocks(eight_firms: pd.DataFrame) -> None:
    boot = WildBootstrap(draws=199, weights="webb", seed=11)
    inf = Inference("clustered", CLUSTER, boot)
    settings = BlockSettings(absorb=parse_absorb(["firm"]))
    a = fit_block(eight_firms, settings, [SpecRequest("s1", "invest", "value", ("capital",), inf)]).results[0]
    b = fit_block(eight_firms, settings, [SpecRequest("s0", "invest", "capital", (), Inference("hc1")),
                                          SpecRequest("s1", "invest", "value", ("capital",), inf)]).results[1]
    assert a.wild_p_value == b.wild_p_value and a.wild_ci_low == b.wild_ci_low
    w1, _ = wild_weights(boot, 8, "s1")
    w2, _ = wild_weights(WildBootstrap(draws=199, weights="webb", seed=12), 8, "s1")
    assert not np.array_equal(w1, w2)


def test_fragile_inference_warnings(eight_firms: pd.DataFrame) -> None:
    df = eight_firms.assign(big=(eight_firms["firm"] == "General Motors").astype(int))
    res = fit_one(df, "invest", "big", absorb=(), inference=Inference("clustered", CLUSTER))
    assert "few clusters: 8 firm < 40" in res.inference_warning
    assert "few treated clusters: 1 firm" in res.inference_warning
    assert res.treated_clusters == 1


@pytest.mark.slow
def test_monte_carlo_size_with_ten_clusters() -> None:
    """Monte Carlo on INVENTED data: 10 clusters of unequal size (5 to 80 observations), a regressor
    with a cluster-level component, cluster-correlated and heteroskedastic errors, true effect zero;
    300 seeds, 199 Webb draws each.

    Conventional clustered t(G-1) tests over-reject at 5% with few, unequal clusters (MacKinnon &
    Webb 2017): we require their rate above 0.10. The WCR rate must be within 0.05 +/- 0.035 (about
    2.8 binomial SEs) and below the conventional one.
    """
    rejections = {"conventional": 0, "wild": 0}
    sizes = np.array([5, 5, 10, 10, 20, 20, 40, 40, 80, 80])
    seeds = range(300)
    for seed in seeds:
        rng = np.random.default_rng(seed)
        cluster = np.repeat(np.arange(10), sizes)
        x = rng.normal(size=10)[cluster] + rng.normal(size=len(cluster))
        e = rng.normal(size=10)[cluster] + rng.normal(size=len(cluster)) * (1 + 0.5 * np.abs(x))
        df = pd.DataFrame({"cluster": cluster, "x": x, "y": e})
        res = fit_one(df, "y", "x", absorb=(), inference=Inference(
            "clustered", (("cluster",),), WildBootstrap(draws=199, weights="webb", seed=seed, interval=False)))
        rejections["conventional"] += res.p_value < 0.05
        rejections["wild"] += res.wild_p_value < 0.05
    conventional = rejections["conventional"] / len(seeds)
    wild = rejections["wild"] / len(seeds)
    assert conventional > 0.10, conventional
    assert abs(wild - 0.05) <= 0.035, (wild, conventional)
    assert conventional > wild
