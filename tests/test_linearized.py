"""Linearized joint-test draws (``joint_inference.method: linearized``): each row's first-order
influence on a specification's estimate, checked against the engine's own cluster-robust variance
(a published identity: the sandwich is the sum of the influences' squares by cluster) and against
the same draws refitted in full (the brute-force reference); the method's size is checked by Monte
Carlo in tests/test_joint.py."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from fegrid.errors import ConfigError
from fegrid.estimate import fit_block
from fegrid.grid import load_config
from fegrid.joint import draw_curves, linearized_draws, without_wild
from fegrid.samples import sample_rows


def _wage_grid(wage_panel: pd.DataFrame) -> tuple[object, pd.DataFrame]:
    """Least squares, 2SLS and Poisson PML on linearmodels' wage_panel (an open dataset), clustered
    by worker; least squares also weighted by hours worked. Poisson PML takes hours worked; the 2SLS
    instruments experience squared with experience (a strong first stage: a linearization is no
    guide to a weakly identified 2SLS, whose estimate is far from normal)."""
    frame = wage_panel.reset_index(drop=True)
    raw = {"run_name": "lin", "data": {"path": "unused.csv", "unit": "nr", "time": "year"},
           "outcomes": ["lwage", "hours"], "focal_regressors": ["union", "expersq"],
           "absorb": {"pooled": [], "worker": ["nr"], "worker_year": ["nr", "year"]},
           "clustering": {"worker": {"kind": "clustered", "by": "nr"}},
           "samples": {"all": {}, "after_1981": {"range": {"year": {"min": 1982}}}},
           "control_sets": {"combinations_of": ["married"]},
           "weights": {"unweighted": None, "by_hours": "hours"},
           "estimators": {"ols": {"method": "least_squares"},
                          "iv": {"method": "two_stage_least_squares", "instruments": ["exper"]},
                          "pml": {"method": "poisson_pml"}},
           "exclude": [{"outcome": "hours", "estimator": ["ols", "iv"]}, {"outcome": "lwage", "estimator": "pml"},
                       {"estimator": ["iv", "pml"], "sample": "after_1981"},
                       {"focal": "expersq", "estimator": ["ols", "pml"]}, {"focal": "union", "estimator": "iv"},
                       {"estimator": "iv", "absorb": "worker_year"},
                       {"weights": "by_hours", "estimator": {"not": ["ols"]}},
                       {"weights": "by_hours", "sample": "after_1981"}]}
    return load_config(raw), frame


def _staggered_grid() -> tuple[object, pd.DataFrame]:
    """The staggered-adoption estimators on an INVENTED panel (this checks algebra, not data, as
    tests/test_reference_staggered.py does): 150 units, 9 periods, three cohorts and never-treated
    units, effects that grow with time since adoption and differ by cohort."""
    rng = np.random.default_rng(17)
    n_units, n_periods = 150, 9
    cohort = rng.choice([3.0, 5.0, 7.0, np.nan], size=n_units, p=[0.25, 0.25, 0.25, 0.25])
    unit = np.repeat(np.arange(n_units), n_periods)
    period = np.tile(np.arange(1, n_periods + 1), n_units)
    adopt = cohort[unit]
    on = np.isfinite(adopt) & (period >= adopt)
    effect = np.where(on, 1.0 + 0.3 * (period - adopt) + 0.6 * np.nan_to_num(adopt), 0.0)
    frame = pd.DataFrame({"unit": unit, "period": period, "adopt": adopt, "d": on.astype(int),
                          "x": rng.normal(size=len(unit)),
                          "y": rng.normal(size=n_units)[unit] + 0.2 * period + effect + rng.normal(size=len(unit))})
    window = [-3, 4]
    raw = {"run_name": "lin", "data": {"path": "unused.csv", "unit": "unit", "time": "period", "treatment": "d",
                                       "adoption": "adopt"},
           "outcomes": ["y"], "focal_regressors": ["d"], "absorb": {"two_way": ["unit", "period"]},
           "clustering": {"unit": {"kind": "clustered", "by": "unit"}},
           "estimators": {"event_study": {"method": "event_study", "window": window, "reference": -1},
                          "interaction_weighted": {"method": "interaction_weighted", "window": window},
                          "imputation": {"method": "imputation", "window": window},
                          "group_time": {"method": "group_time", "window": window, "controls_from": "never_treated"}}}
    return load_config(raw), frame


def _influence_by_unit(grid, frame: pd.DataFrame, unit: str) -> pd.DataFrame:
    """Per specification: the engine's SE clustered by unit, and the root of G/(G-1) times the sum of
    squares of its influence summed by unit."""
    codes = pd.factorize(frame[unit], sort=True)[0]
    rows = []
    for spec in grid.expand():
        positions = sample_rows(frame, spec.sample, grid.panel)
        fit = fit_block(frame.iloc[positions], grid.block_settings(spec), [without_wild(spec.request())],
                        coefficients=False, influence=True)
        result = fit.results[0]
        assert result.status == "ok", (spec.spec_id, result.message)
        where, psi = fit.influence[spec.spec_id]
        by_unit = np.bincount(codes[positions[where]], weights=psi)
        g = int(np.count_nonzero(np.bincount(codes[positions[where]])))
        rows.append({"method": spec.estimator.method, "absorb": spec.name("absorb"), "weights": spec.name("weights"),
                     "se": result.std_error,
                     "from_influence": float(np.sqrt(by_unit @ by_unit * g / (g - 1)))})
    return pd.DataFrame(rows)


def test_influence_gives_the_clustered_se_of_least_squares_2sls_and_poisson(wage_panel) -> None:
    """The clustered sandwich is ``G/(G-1) (N-1)/(N-K)`` times the sum over clusters of the summed
    influences squared (Cameron & Miller 2015); on wage_panel N = 4,360 and K <= 9, so the two SEs
    agree to 0.1%."""
    grid, frame = _wage_grid(wage_panel)
    got = _influence_by_unit(grid, frame, "nr")
    assert set(got["method"]) == {"least_squares", "two_stage_least_squares", "poisson_pml"}
    assert got["weights"].eq("by_hours").any()
    ratio = got["se"] / got["from_influence"]
    assert ((ratio >= 1.0 - 1e-9) & (ratio <= 1.001)).all(), got.assign(ratio=ratio)


def test_influence_gives_the_clustered_se_of_the_staggered_estimators() -> None:
    """The event study, interaction-weighted (with its cohort shares' part, Sun & Abraham 2021) and
    group-time (Callaway & Sant'Anna 2021) estimators: their clustered SEs are sums of the same
    influences, up to ``(N-1)/(N-K)`` on the indicators' part (K about 30 on N = 1,350 rows: below 2%).
    Effects differ strongly by cohort, so the shares' part matters: without it the interaction-weighted
    ratio is about 1.19. The imputation estimator's variance (Borusyak, Jaravel & Spiess 2024, Theorem 3)
    replaces the treated rows' deviations from the estimate by deviations from their cohort x
    period means, so its SE is smaller than the influence's whenever effects differ across cells."""
    grid, frame = _staggered_grid()
    got = _influence_by_unit(grid, frame, "unit").set_index("method")
    ratio = got["se"] / got["from_influence"]
    for method in ("event_study", "interaction_weighted", "group_time"):
        assert 1.0 - 1e-9 <= ratio[method] <= 1.02, (method, ratio[method])
    assert ratio["imputation"] < 0.9


@pytest.mark.parametrize("which", ["wage_panel", "staggered"])
def test_linearized_draws_track_the_same_draws_refitted(which, wage_panel) -> None:
    """The same 25 draws of whole units, linearized and refitted in full: per specification the
    estimates move together (correlation >= 0.9) by about as much (ratio of SDs within 0.75-1.33), and
    the linearized SEs (the observed SE scaled as the draw scales the influences' sum of squares)
    average the refits' within 5%. Data: wage_panel (linearmodels, open) or the INVENTED
    staggered panel above."""
    grid, frame = _wage_grid(wage_panel) if which == "wage_panel" else _staggered_grid()
    specs = grid.expand()
    unit = grid.panel.unit
    lin = linearized_draws(grid, frame, specs, range(25), seed=5, column=unit)
    full = draw_curves(grid, frame, specs, range(25), seed=5, column=unit)
    both = lin.merge(full, on=["draw", "spec_id"], suffixes=("_lin", "_full"))
    assert len(both) == 25 * len(specs)
    for spec_id, part in both.groupby("spec_id"):
        a, b = part["estimate_lin"].to_numpy(), part["estimate_full"].to_numpy()
        assert np.corrcoef(a, b)[0, 1] >= 0.9, spec_id
        assert 0.75 <= a.std() / b.std() <= 1.33, (spec_id, a.std() / b.std())
        se_lin, se_full = part["std_error_lin"].to_numpy(), part["std_error_full"].to_numpy()
        assert 0.95 <= se_lin.mean() / se_full.mean() <= 1.05, (spec_id, se_lin.mean() / se_full.mean())
    assert not lin["imposed"].any()


def test_linearized_draws_are_one_job_and_their_own_key(tiny_project: Path, monkeypatch) -> None:
    """Linearized draws run in one job (one fit serves every draw) with a key of their own, so that
    switching the method never reuses the other method's draws; a misspelt method is refused with
    the key named. Data: statsmodels' Grunfeld (conftest)."""
    from fegrid.pipeline import draw_null_chunk, make_plan, snapshot_data

    monkeypatch.chdir(tiny_project)
    refit = make_plan("grid.yaml")
    assert refit.grid.joint_method == "refit" and len(refit.joint_paths()) == 2
    text = (tiny_project / "grid.yaml").read_text()
    (tiny_project / "grid.yaml").write_text(text.replace("seed: 7}", "seed: 7, method: linearized}"))
    lin = make_plan("grid.yaml")
    assert lin.grid.joint_method == "linearized" and len(lin.joint_paths()) == 1
    assert lin.joint_key != refit.joint_key
    snapshot = tiny_project / f"{lin.snapshot_key}.parquet"
    snapshot_data(lin.grid, snapshot)
    out = tiny_project / "draws.parquet"
    draw_null_chunk(lin.grid, snapshot, lin.joint_key, 0, out)
    table = pd.read_parquet(out)
    assert sorted(table["draw"].unique()) == list(range(20)) and len(table) == 20 * len(lin.specs)
    (tiny_project / "grid.yaml").write_text(text.replace("seed: 7}", "seed: 7, method: linear}"))
    with pytest.raises(ConfigError, match="joint_inference.method"):
        make_plan("grid.yaml")


def test_fits_without_diagnostics_keep_every_number_the_draws_read(wage_panel) -> None:
    """The joint tests' draws fit without diagnostics (``fit_block(..., diagnostics=False)``): the
    estimate, SE and df equal a full fit's (bit for bit for 2SLS; to 1e-12 for the imputation estimator,
    whose overall weights are then solved for alone, not beside each relative period's, and for the
    group-time effects, whose overall estimate then comes from the post-adoption cells alone), while the
    2SLS first stage and Anderson-Rubin set (wage_panel) and the imputation and group-time estimators'
    tests of parallel trends and per-period estimates (the invented staggered panel) are left out."""
    for grid, frame in (_wage_grid(wage_panel), _staggered_grid()):
        for spec in grid.expand():
            if spec.estimator.method not in ("two_stage_least_squares", "imputation", "group_time"):
                continue
            part = frame.iloc[sample_rows(frame, spec.sample, grid.panel)]
            request = [without_wild(spec.request())]
            full = fit_block(part, grid.block_settings(spec), request, coefficients=False).results[0]
            lean = fit_block(part, grid.block_settings(spec), request, coefficients=False,
                             diagnostics=False).results[0]
            assert full.status == lean.status == "ok", full.message
            if spec.estimator.method in ("imputation", "group_time"):
                np.testing.assert_allclose([lean.estimate, lean.std_error], [full.estimate, full.std_error],
                                           rtol=1e-12)
                assert lean.df_inference == full.df_inference
                assert np.isfinite(full.pretrend_p_value) and np.isnan(lean.pretrend_p_value)
            else:
                assert (lean.estimate, lean.std_error, lean.df_inference) == (full.estimate, full.std_error,
                                                                              full.df_inference)
                assert full.first_stage and np.isfinite(full.ar_p_value) and np.isfinite(full.effective_f)
                assert not lean.first_stage and np.isnan(lean.ar_p_value) and np.isnan(lean.effective_f)


def test_indicator_estimators_give_the_same_bytes_alone_and_beside_other_control_sets() -> None:
    """The event study's and the interaction-weighted estimator's indicators are demeaned once per
    design and shared by its outcomes and control sets: each specification's numbers are the same,
    bit for bit, fitted alone or with the others (invented staggered panel)."""
    grid, frame = _staggered_grid()
    grid = load_config({**grid.raw, "control_sets": {"combinations_of": ["x"]},
                        "clustering": {"unit": {"kind": "clustered", "by": "unit"}, "robust": {"kind": "hc1"}}})
    specs = [s for s in grid.expand() if s.estimator.method in ("event_study", "interaction_weighted")]
    assert len({s.controls for s in specs}) == 2
    together = {r.spec_id: r for r in fit_block(frame, grid.block_settings(specs[0]),
                                                 [s.request() for s in specs]).results}
    for spec in specs:
        alone = fit_block(frame, grid.block_settings(spec), [spec.request()]).results[0]
        assert alone.status == "ok", alone.message
        assert (alone.estimate, alone.std_error, alone.pretrend_p_value) == (
            together[spec.spec_id].estimate, together[spec.spec_id].std_error,
            together[spec.spec_id].pretrend_p_value)


def test_indicator_estimators_in_draws_give_the_full_fit_s_standard_error() -> None:
    """In the draws (``diagnostics=False``, no coefficients kept) the event study's and the
    interaction-weighted estimator's SE comes from the reported combination's own ``h = X B a`` (plus
    the cohort shares' part for it alone), not from the whole matrix of every reported row: the same
    SE to rounding for the clustered and heteroskedasticity-robust kinds, with the pre-trend test left
    out; the same bytes for the homoskedastic and two-way kinds, which keep the matrix (invented
    staggered panel)."""
    grid, frame = _staggered_grid()
    grid = load_config({**grid.raw, "clustering": {
        "unit": {"kind": "clustered", "by": "unit"}, "robust": {"kind": "hc1"},
        "iid": {"kind": "homoskedastic"}, "two_way": {"kind": "two_way_clustered", "by": ["unit", "period"]}}})
    specs = [s for s in grid.expand() if s.estimator.method in ("event_study", "interaction_weighted")]
    requests = [s.request() for s in specs]
    full = fit_block(frame, grid.block_settings(specs[0]), requests, coefficients=False).results
    lean = fit_block(frame, grid.block_settings(specs[0]), requests, coefficients=False, diagnostics=False).results
    assert len(full) == 8
    for spec, a, b in zip(specs, full, lean):
        assert a.status == b.status == "ok" and a.estimate == b.estimate and a.df_inference == b.df_inference
        assert np.isfinite(a.pretrend_p_value)
        if spec.inference.kind in ("two_way_clustered", "homoskedastic"):  # these keep the whole matrix
            assert (b.std_error, b.pretrend_p_value) == (a.std_error, a.pretrend_p_value)
        else:
            assert b.std_error == pytest.approx(a.std_error, rel=1e-12) and b.std_error != 0
            assert np.isnan(b.pretrend_p_value)
