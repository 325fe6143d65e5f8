"""Monte Carlo on INVENTED staggered panels: effects that grow with time since adoption, a large early
cohort, a late one and a few never-treated units. The two-way estimate has the wrong sign; the
heterogeneity-robust estimators recover the planted average effect on the treated with intervals that
cover it about 95% of the time.

Tolerances beside each check: the coverage's binomial SE with 200 replications is 1.5 points (common
practice: three SEs); the bias bound is several simulation SEs wide.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from fegrid.absorb import parse_absorb
from fegrid.estimate import BlockSettings, Inference, SpecRequest, fit_block
from fegrid.estimators import parse_estimator

pytestmark = pytest.mark.slow

REPLICATIONS = 200
SETTINGS = BlockSettings(absorb=parse_absorb(["unit", "period"]), unit="unit", time="period", treatment="d",
                         adoption="adopt")
METHODS = {
    "two_way": {"method": "least_squares"},
    "interaction_weighted": {"method": "interaction_weighted", "window": [-3, 3]},
    "imputation": {"method": "imputation", "window": [-3, 3]},
    "group_time_never": {"method": "group_time", "uniform_band_draws": 0},
    "group_time_not_yet": {"method": "group_time", "controls_from": "not_yet_treated", "uniform_band_draws": 0},
}
SPECS = [SpecRequest(name, "y", "d", (), Inference("clustered", (("unit",),)), parse_estimator(name, body))
         for name, body in METHODS.items()]


def _panel(rng: np.random.Generator, units: int = 200, periods: int = 10) -> tuple[pd.DataFrame, float]:
    """Half the units adopt in period 2, 45% in period 8, the rest never; the effect is 0.5 in the first
    treated period and grows by 1 a period. Returns the panel and the planted average effect on the
    treated observations."""
    early, late = int(0.5 * units), int(0.45 * units)
    adopt = np.r_[np.full(early, 2.0), np.full(late, 8.0), np.full(units - early - late, np.nan)]
    unit = np.repeat(np.arange(units), periods)
    period = np.tile(np.arange(1, periods + 1), units)
    a = adopt[unit]
    since = period - a
    treated = np.isfinite(a) & (since >= 0)
    effect = np.where(treated, 0.5 + np.nan_to_num(since), 0.0)
    y = rng.normal(size=units)[unit] + 0.3 * period + effect + rng.normal(size=len(unit))
    frame = pd.DataFrame({"unit": unit, "period": period, "d": treated.astype(float), "adopt": a, "y": y})
    return frame, float(effect[treated].mean())


@pytest.fixture(scope="module")
def simulated() -> pd.DataFrame:
    rng = np.random.default_rng(20261202)
    rows = []
    for _ in range(REPLICATIONS):
        frame, att = _panel(rng)
        fitted = {r.spec_id: r for r in fit_block(frame, SETTINGS, SPECS).results}
        for name, r in fitted.items():
            rows.append({"method": name, "estimate": r.estimate, "covers": r.ci_low <= att <= r.ci_high,
                         "att": att, "negative_weights": r.negative_weights, "sign_flip_sd": r.sign_flip_sd})
    return pd.DataFrame(rows)


def test_the_two_way_estimate_has_the_wrong_sign(simulated):
    two_way = simulated[simulated["method"] == "two_way"]
    att = float(two_way["att"].iloc[0])
    assert att > 3 and (two_way["estimate"] < 0).all()
    # de Chaisemartin & D'Haultfoeuille (2020): negative weights, and a small heterogeneity suffices to flip the sign
    assert (two_way["negative_weights"] > 0).all() and (two_way["sign_flip_sd"] < att).all()


@pytest.mark.parametrize("method", ["interaction_weighted", "imputation", "group_time_never", "group_time_not_yet"])
def test_robust_estimators_recover_the_planted_effect_and_cover_it(method, simulated):
    rows = simulated[simulated["method"] == method]
    att = float(rows["att"].iloc[0])
    sim_se = rows["estimate"].std() / np.sqrt(len(rows))
    assert abs(rows["estimate"].mean() - att) < max(4 * sim_se, 0.02 * att)  # unbiased: within 4 simulation SEs
    coverage = rows["covers"].mean()
    assert 0.95 - 3 * 0.015 <= coverage <= 0.995, coverage  # near 95% (imputation's variance is conservative)
