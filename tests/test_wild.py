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
                   inference=Inference("cluster", CLUSTER, boot))
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


def test_interval_by_test_inversion_brackets_the_estimate(eight_firms: pd.DataFrame) -> None:
    res = fit_one(eight_firms, "invest", "value", controls=["capital"], absorb=parse_absorb(["firm"]),
                  inference=Inference("cluster", CLUSTER, WildBootstrap(draws=999, weights="webb", seed=3)))
    assert res.wild_ci_low < res.estimate < res.wild_ci_high
    # with few clusters the bootstrap interval is wider than the t(G-1) one (common practice)
    assert res.wild_ci_high - res.wild_ci_low > 0.5 * (res.ci_high - res.ci_low)


def test_reproducible_and_independent_of_blocks(eight_firms: pd.DataFrame) -> None:
    boot = WildBootstrap(draws=199, weights="webb", seed=11)
    inf = Inference("cluster", CLUSTER, boot)
    settings = BlockSettings(absorb=parse_absorb(["firm"]))
    a = fit_block(eight_firms, settings, [SpecRequest("s1", "invest", "value", ("capital",), inf)]).results[0]
    b = fit_block(eight_firms, settings, [SpecRequest("s0", "invest", "capital", (), Inference("robust")),
                                          SpecRequest("s1", "invest", "value", ("capital",), inf)]).results[1]
    assert a.wild_p_value == b.wild_p_value and a.wild_ci_low == b.wild_ci_low
    w1, _ = wild_weights(boot, 8, "s1")
    w2, _ = wild_weights(WildBootstrap(draws=199, weights="webb", seed=12), 8, "s1")
    assert not np.array_equal(w1, w2)


def test_fragile_inference_warnings(eight_firms: pd.DataFrame) -> None:
    df = eight_firms.assign(big=(eight_firms["firm"] == "General Motors").astype(int))
    res = fit_one(df, "invest", "big", absorb=(), inference=Inference("cluster", CLUSTER))
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
            "cluster", (("cluster",),), WildBootstrap(draws=199, weights="webb", seed=seed, interval=False)))
        rejections["conventional"] += res.p_value < 0.05
        rejections["wild"] += res.wild_p_value < 0.05
    conventional = rejections["conventional"] / len(seeds)
    wild = rejections["wild"] / len(seeds)
    assert conventional > 0.10, conventional
    assert abs(wild - 0.05) <= 0.035, (wild, conventional)
    assert conventional > wild
