"""Joint inference across the curve: Monte Carlo checks on INVENTED panels, and how draws are split."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from fegrid.estimate import fit_block
from fegrid.grid import load_config, spec_table
from fegrid.joint import draw_curves, joint_tests, linearized_draws, resample_panel, shared_cluster_caution


def _invented_panel(seed: int, effect: float, units: int = 30, periods: int = 5) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    unit = np.repeat(np.arange(units), periods)
    a = rng.normal(size=units)[unit]
    x = 0.7 * a + rng.normal(size=len(unit))
    return pd.DataFrame({"unit": unit, "time": np.tile(np.arange(periods), units), "x": x,
                         "c1": rng.normal(size=len(unit)), "c2": rng.normal(size=len(unit)),
                         "y": effect * x + a + rng.normal(size=len(unit))})


MC_GRID = {
    "run_name": "mc", "data": {"path": "unused.csv", "unit": "unit", "time": "time"},
    "outcomes": ["y"], "focal_regressors": ["x"],
    "absorb": {"unit": ["unit"], "unit_time": ["unit", "time"]},
    "clustering": {"robust": {"kind": "hc1"}, "unit": {"kind": "clustered", "by": "unit"}},
    "control_sets": {"combinations_of": ["c1", "c2"]},
}


def _observed(grid, frame, specs) -> pd.DataFrame:

    rows = []
    by_block: dict[str, list] = {}
    for s in specs:
        by_block.setdefault(s.block_key, []).append(s)
    for block in by_block.values():
        fit = fit_block(frame, grid.block_settings(block[0]), [s.request() for s in block])
        rows.extend(r.record() for r in fit.results)
    table = spec_table(grid, specs)
    return table.merge(pd.DataFrame(rows), on="spec_id")


def _joint_p(seed: int, effect: float, draws: int, linearized: bool = False) -> pd.Series:
    grid = load_config(MC_GRID)
    specs = grid.expand()
    frame = _invented_panel(seed, effect)
    ledger = _observed(grid, frame, specs)
    boot = (linearized_draws if linearized else draw_curves)(grid, frame, specs, range(draws), seed=seed, column="unit")
    tests = joint_tests(ledger, boot, 0.95)
    return tests.set_index("statistic")["p_value"]


@pytest.mark.slow
def test_joint_tests_uniform_under_the_null_and_small_under_an_effect() -> None:
    """Monte Carlo on INVENTED panels (30 units x 5 periods, 16 specifications, 49 draws each).

    Under a true null the p-values of the two continuous statistics (median, Stouffer's Z) should be
    roughly uniform across 40 seeds: we accept a mean within 0.5 +/- 0.15. The share significant is
    discrete (often no specification is significant, and then p = 1), so its test is conservative:
    we accept a mean of at least 0.35. All three must hold their size: at most 20% of the seeds
    below 0.10 (about 3 binomial SEs above 10%). With a strong effect (0.5, t about 8) every p-value
    is below 0.05.
    """
    null = pd.DataFrame([_joint_p(seed, 0.0, 49) for seed in range(40)])
    for stat in ("median_estimate", "stouffer_z"):
        assert 0.35 <= null[stat].mean() <= 0.65, (stat, null[stat].mean())
    assert null["share_significant"].mean() >= 0.35
    for stat in ("median_estimate", "share_significant", "stouffer_z"):
        assert (null[stat] < 0.10).mean() <= 0.20, (stat, (null[stat] < 0.10).mean())
    strong = _joint_p(7, 0.5, 49)
    assert (strong < 0.05).all(), strong


@pytest.mark.slow
def test_linearized_joint_tests_hold_the_size_of_the_refitted_ones() -> None:
    """Monte Carlo of the linearized draws (``joint_inference.method: linearized``) against the refitted
    draws on the same INVENTED panels and the same draws (30 units, 16 specifications: few resampled
    units, where a first-order expansion is least accurate): 100 seeds, 99 draws each, under the null.
    Per statistic the two methods' p-values correlate at >= 0.97 and differ by <= 0.04 on average,
    and their rejection rates at 10% differ by <= 5 points. (In one run of 200 seeds x 199 draws:
    correlations 0.998 to 0.9998, mean differences 0.0015 to 0.015, and rejection rates at 10% of
    16.5-17.5% for both methods on the median and Stouffer's Z: with 30 units the bootstrap itself
    rejects too often, and the linearization inherits that, no more.) With a strong effect every
    linearized p-value is below 0.05."""
    seeds = range(100)
    lin = pd.DataFrame([_joint_p(seed, 0.0, 99, linearized=True) for seed in seeds])
    fit = pd.DataFrame([_joint_p(seed, 0.0, 99) for seed in seeds])
    for stat in ("median_estimate", "share_significant", "stouffer_z"):
        assert np.corrcoef(lin[stat], fit[stat])[0, 1] >= 0.97, stat
        assert (lin[stat] - fit[stat]).abs().mean() <= 0.04, stat
        assert abs((lin[stat] < 0.10).mean() - (fit[stat] < 0.10).mean()) <= 0.05, stat
    strong = _joint_p(7, 0.5, 199, linearized=True)
    assert (strong < 0.05).all(), strong


def test_the_caution_names_the_clusterings_whose_draws_widen_their_standard_errors() -> None:
    """Invented panel (30 units in 6 regions): refitted draws resampling units keep a drawn unit's
    copies in one region cluster, and the draws' region-clustered SEs come out wider than the data's,
    while unit-clustered ones do not; the caution names the region choice only, and is silent when
    the regions are resampled or the draws are linearized."""
    raw = {**MC_GRID, "clustering": {**MC_GRID["clustering"], "region": {"kind": "clustered", "by": "region"}}}
    grid = load_config(raw)
    specs = grid.expand()
    frame = _invented_panel(4, 0.0).assign(region=lambda d: d["unit"] % 6)
    ledger = _observed(grid, frame, specs).set_index("spec_id")
    boot = draw_curves(grid, frame, specs, range(30), seed=4, column="unit")
    ratio = (boot["std_error"] / boot["spec_id"].map(ledger["std_error"])).groupby(
        boot["spec_id"].map(ledger["clustering"])).mean()
    assert ratio["region"] > 1.15 and 0.85 < ratio["unit"] < 1.1, ratio
    names = {s.name("clustering") for s in specs}
    caution = shared_cluster_caution(grid, names)
    assert "region (by region)" in caution and "unit (by" not in caution and "robust" not in caution
    assert shared_cluster_caution(grid, names - {"region"}) == ""
    assert shared_cluster_caution(load_config({**raw, "joint_inference": {"resample": "region"}}), names) == ""
    assert shared_cluster_caution(load_config({**raw, "joint_inference": {"method": "linearized"}}), names) == ""


def test_draws_do_not_depend_on_chunking_and_units_stay_separate() -> None:
    grid = load_config(MC_GRID)
    specs = grid.expand()
    frame = _invented_panel(3, 0.2)
    whole = draw_curves(grid, frame, specs, range(4), seed=11, column="unit")
    parts = pd.concat([draw_curves(grid, frame, specs, r, seed=11, column="unit")
                       for r in (range(0, 1), range(1, 4))], ignore_index=True)
    pd.testing.assert_frame_equal(whole, parts)
    boot = resample_panel(frame, "unit", "unit", np.random.default_rng([11, 0]))
    assert len(boot) == len(frame) and boot["unit"].nunique() == frame["unit"].nunique()
    assert not boot.duplicated(["unit", "time"]).any()  # a unit drawn twice is two units


def test_a_draw_skips_the_wild_bootstrap_and_keeps_every_number() -> None:
    """Each draw is compared with the same draw refitted by fit_block with the full requests (the
    wild bootstrap included): estimate, SE and df are equal to the last digit (INVENTED panel)."""
    raw = {**MC_GRID, "clustering": {"unit": {"kind": "clustered", "by": "unit"},
                                     "unit_wild": {"kind": "clustered", "by": "unit",
                                                   "wild_bootstrap": {"draws": 99, "seed": 3}}}}
    grid = load_config(raw)
    specs = grid.expand()
    frame = _invented_panel(5, 0.3)
    fast = draw_curves(grid, frame, specs, range(2), seed=4, column="unit", reweight=False)
    rows = []
    for d in range(2):
        boot = resample_panel(frame, "unit", "unit", np.random.default_rng([4, d]))
        by_block: dict[str, list] = {}
        for s in specs:
            by_block.setdefault(s.block_key, []).append(s)
        for key in sorted(by_block):
            fit = fit_block(boot, grid.block_settings(by_block[key][0]), [s.request() for s in by_block[key]])
            assert any(r.wild_p_value == r.wild_p_value for r in fit.results)  # the full path ran it
            rows.extend({"draw": d, "spec_id": r.spec_id, "estimate": r.estimate, "std_error": r.std_error,
                         "df_inference": r.df_inference} for r in fit.results)
    full = pd.DataFrame(rows)
    assert not fast.pop("imposed").any()  # least squares: the null is imposed by centring, not on the data
    pd.testing.assert_frame_equal(fast.sort_values(["draw", "spec_id"], ignore_index=True),
                                  full.sort_values(["draw", "spec_id"], ignore_index=True), rtol=0, atol=0)


def _invented_counts(seed: int, units: int = 40, periods: int = 6) -> pd.DataFrame:
    """An INVENTED panel with an instrument z for x and a count outcome with zeros."""
    rng = np.random.default_rng(seed)
    unit = np.repeat(np.arange(units), periods)
    a = rng.normal(size=units)[unit]
    z = rng.normal(size=len(unit))
    v = rng.normal(size=len(unit))
    x = 0.8 * z + 0.5 * v + 0.3 * a
    return pd.DataFrame({"unit": unit, "time": np.tile(np.arange(periods), units), "x": x, "z": z,
                         "y": 0.4 * x + a + v + rng.normal(size=len(unit)),
                         "count": rng.poisson(np.exp(-0.5 + 0.3 * x + 0.5 * a)).astype(float)})


def test_draws_of_2sls_and_poisson_pml_equal_brute_force_refits_under_the_imposed_null() -> None:
    """Every draw of a 2SLS specification is the plain refit of the resampled panel (its null is
    imposed by centring, as for least squares); every draw of a Poisson PML specification is the
    refit of the resampled panel on y exp(-b x), b its observed estimate (INVENTED panel; the
    reference is fegrid's own single-specification path on an explicitly built resampled panel)."""
    from fegrid.absorb import parse_absorb
    from fegrid.estimate import Inference, fit_one
    from fegrid.estimators import Estimator

    raw = {"run_name": "est", "data": {"path": "unused.csv", "unit": "unit", "time": "time"},
           "outcomes": ["y", "count"], "focal_regressors": ["x"], "absorb": {"unit": ["unit"]},
           "clustering": {"unit": {"kind": "clustered", "by": "unit"}},
           "estimators": {"ols": {"method": "least_squares"},
                          "iv": {"method": "two_stage_least_squares", "instruments": ["z"]},
                          "pml": {"method": "poisson_pml"}},
           "exclude": [{"outcome": "count", "estimator": ["ols", "iv"]}, {"outcome": "y", "estimator": "pml"}]}
    grid = load_config(raw)
    specs = grid.expand()
    assert sorted(s.curve for s in specs) == ["least_squares", "poisson_pml", "two_stage_least_squares"]
    frame = _invented_counts(2)
    ledger = _observed(grid, frame, specs)
    draws = draw_curves(grid, frame, specs, range(3), seed=9, column="unit")
    settings = {"absorb": parse_absorb(["unit"]), "inference": Inference("clustered", (("unit",),)),
                "unit": "unit", "time": "time"}
    for spec in specs:
        observed = float(ledger.set_index("spec_id").loc[spec.spec_id, "estimate"])
        for d in range(3):
            boot = resample_panel(frame, "unit", "unit", np.random.default_rng([9, d]))
            row = draws[(draws["draw"] == d) & (draws["spec_id"] == spec.spec_id)].iloc[0]
            if spec.estimator.method == "poisson_pml":
                boot = boot.assign(null=boot["count"] * np.exp(-observed * boot["x"]))
                ref = fit_one(boot, "null", "x", estimator=Estimator("poisson_pml"), **settings)
                assert bool(row["imposed"])
            else:
                ref = fit_one(boot, spec.outcome, "x", estimator=spec.estimator, **settings)
                assert not bool(row["imposed"])
            if spec.estimator.method == "poisson_pml":  # both to the iterations' precision (the draw starts
                # from the design's own fit, the reference from its outcome): 1e-8 of the SE near zero
                assert row["estimate"] == pytest.approx(ref.estimate, rel=1e-8, abs=1e-8 * ref.std_error)
                assert row["std_error"] == pytest.approx(ref.std_error, rel=1e-8)
            else:
                assert row["estimate"] == pytest.approx(ref.estimate, rel=1e-9, abs=1e-12)
                assert row["std_error"] == pytest.approx(ref.std_error, rel=1e-9)
    tests = joint_tests(ledger, draws, 0.95)
    assert sorted(tests["curve"].unique()) == ["least_squares", "poisson_pml", "two_stage_least_squares"]
    assert (tests["draws"] == 3).all()
