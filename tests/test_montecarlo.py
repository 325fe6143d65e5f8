"""Monte Carlo on INVENTED data: the within estimator removes a unit effect correlated with x.

Design (invented): 60 units x 8 periods, unit effect a_i ~ N(0, 1), x_it = 0.8 a_i + N(0, 1),
y_it = 0.5 x_it + a_i + e_it with e_it ~ N(0, 1) and serial correlation 0.5 within units.
Pooled OLS converges to 0.5 + 0.8 / (0.64 + 1) = 0.988; the within estimator to 0.5.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from fegrid.absorb import parse_absorb
from fegrid.estimate import BlockSettings, Inference, SpecRequest, fit_block

pytestmark = pytest.mark.slow

TRUE = 0.5
SEEDS = range(400)


def _panel(seed: int, units: int = 60, periods: int = 8) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    a = rng.normal(size=units)
    unit = np.repeat(np.arange(units), periods)
    x = 0.8 * a[unit] + rng.normal(size=units * periods)
    e = np.empty((units, periods))
    e[:, 0] = rng.normal(size=units)
    for t in range(1, periods):
        e[:, t] = 0.5 * e[:, t - 1] + np.sqrt(0.75) * rng.normal(size=units)
    y = TRUE * x + a[unit] + e.ravel()
    return pd.DataFrame({"unit": unit, "time": np.tile(np.arange(periods), units), "x": x, "y": y})


@pytest.fixture(scope="module")
def draws() -> pd.DataFrame:
    rows = []
    cluster = Inference("clustered", (("unit",),))
    for seed in SEEDS:
        df = _panel(seed)
        within = fit_block(df, BlockSettings(absorb=parse_absorb(["unit"])),
                           [SpecRequest("w", "y", "x", (), cluster)]).results[0]
        pooled = fit_block(df, BlockSettings(absorb=()),
                           [SpecRequest("p", "y", "x", (), cluster)]).results[0]
        rows.append({"within": within.estimate, "pooled": pooled.estimate,
                     "covered": within.ci_low <= TRUE <= within.ci_high})
    return pd.DataFrame(rows)


def test_pooled_ols_is_biased_and_within_is_not(draws: pd.DataFrame) -> None:
    # Monte Carlo standard error of the mean of 400 draws is about 0.003 for the within estimator
    assert draws["pooled"].mean() == pytest.approx(0.988, abs=0.02)
    assert draws["within"].mean() == pytest.approx(TRUE, abs=0.01)


def test_clustered_intervals_cover_at_about_95_percent(draws: pd.DataFrame) -> None:
    # binomial SE of a 95% share over 400 draws: 0.011; accept +/- 3 SE (0.917 to 0.983)
    assert 0.917 <= draws["covered"].mean() <= 0.983
