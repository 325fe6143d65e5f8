"""Monte Carlo on INVENTED panels for the estimator dimension: 2SLS, Poisson PML, Anderson-Rubin.

Tolerances are stated beside each check: binomial SEs of the rejection rates (common practice: three
SEs), and a bias bound several simulation SEs wide.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from fegrid.absorb import parse_absorb
from fegrid.estimate import BlockSettings, Inference, SpecRequest, fit_block
from fegrid.estimators import Estimator

pytestmark = pytest.mark.slow

SETTINGS = BlockSettings(absorb=parse_absorb(["unit", "time"]), unit="unit", time="time")
CLUSTERED = Inference("clustered", (("unit",),))


def _iv_panel(seed: int, strength: float, units: int = 80, periods: int = 5) -> pd.DataFrame:
    """x is endogenous (it shares the shock u with y, which varies within units, so unit effects do
    not remove it); z moves x and nothing else. True effect 0.5."""
    rng = np.random.default_rng(seed)
    n = units * periods
    unit = np.repeat(np.arange(units), periods)
    a = rng.normal(size=units)[unit]
    z = rng.normal(size=n)
    u = rng.normal(size=n)
    x = strength * z + 0.8 * u + 0.5 * a + rng.normal(size=n) * 0.6
    y = 0.5 * x + a + u + rng.normal(size=n) * 0.5
    return pd.DataFrame({"unit": unit, "time": np.tile(np.arange(periods), units), "x": x, "z": z, "y": y})


def _fit(frame: pd.DataFrame, specs: list[SpecRequest]) -> dict[str, object]:
    return {r.spec_id: r for r in fit_block(frame, SETTINGS, specs, coefficients=False).results}


def test_2sls_recovers_the_truth_where_least_squares_is_biased() -> None:
    """200 INVENTED panels with a strong instrument: mean 2SLS estimate within 0.03 of 0.5 (about five
    simulation SEs), least squares at least 0.2 too high, and the clustered 2SLS interval covers 0.5
    in 88-99% of panels (95% nominal, about three binomial SEs)."""
    iv, ols, covered = [], [], []
    for seed in range(200):
        frame = _iv_panel(seed, strength=1.0)
        res = _fit(frame, [SpecRequest("ols", "y", "x", (), CLUSTERED),
                           SpecRequest("iv", "y", "x", (), CLUSTERED, Estimator("two_stage_least_squares", ("z",)))])
        iv.append(res["iv"].estimate)
        ols.append(res["ols"].estimate)
        covered.append(res["iv"].ci_low <= 0.5 <= res["iv"].ci_high)
    assert abs(np.mean(iv) - 0.5) < 0.03, np.mean(iv)
    assert np.mean(ols) - 0.5 > 0.2, np.mean(ols)
    assert 0.88 <= np.mean(covered) <= 0.99, np.mean(covered)


def test_anderson_rubin_holds_its_size_with_a_weak_instrument() -> None:
    """400 INVENTED panels with a weak instrument (first-stage coefficient 0.08, effective F about 2):
    the Anderson-Rubin test of the true value rejects in 2-9% of panels at 5% (about three binomial
    SEs), and its set contains the truth as often; the weak first stage is flagged in the ledger."""
    rejected, flagged = [], []
    for seed in range(400):
        frame = _iv_panel(1000 + seed, strength=0.08)
        frame["y0"] = frame["y"] - 0.5 * frame["x"]  # testing beta = 0.5 is testing a zero effect on y - 0.5 x
        res = _fit(frame, [SpecRequest("iv", "y0", "x", (), CLUSTERED,
                                       Estimator("two_stage_least_squares", ("z",)))])["iv"]
        rejected.append(res.ar_p_value < 0.05)
        flagged.append("weak first stage" in res.inference_warning)
    assert 0.02 <= np.mean(rejected) <= 0.09, np.mean(rejected)
    assert np.mean(flagged) > 0.9


def _count_panel(seed: int, units: int = 150, periods: int = 6) -> pd.DataFrame:
    """Counts with many zeros from a Poisson-gamma mixture whose dispersion grows with x: the mean is
    exp(-1 + 0.3 x + a), so Poisson PML is consistent; the log of (y + 1) is not the log of the mean."""
    rng = np.random.default_rng(seed)
    n = units * periods
    unit = np.repeat(np.arange(units), periods)
    a = rng.normal(scale=0.5, size=units)[unit]
    x = rng.normal(size=n) + 0.3 * a
    mean = np.exp(-1.0 + 0.3 * x + a)
    shape = 1.0 / (0.2 + 0.8 * (x > 0))  # more dispersion where x is high
    y = rng.poisson(mean * rng.gamma(shape, 1.0 / shape))
    return pd.DataFrame({"unit": unit, "time": np.tile(np.arange(periods), units), "x": x, "y": y.astype(float),
                         "log_y1": np.log1p(y)})


def test_poisson_pml_is_consistent_with_zeros_where_log_ols_is_not() -> None:
    """100 INVENTED count panels (about half zeros): mean PML estimate within 0.03 of 0.3 (several
    simulation SEs), clustered PML intervals cover 0.3 in 85-99% of panels, and least squares on
    log(y + 1) is off by more than 0.1."""
    pml, logols, covered = [], [], []
    for seed in range(100):
        frame = _count_panel(seed)
        res = _fit(frame, [SpecRequest("pml", "y", "x", (), CLUSTERED, Estimator("poisson_pml")),
                           SpecRequest("log", "log_y1", "x", (), CLUSTERED)])
        assert res["pml"].status == "ok" and res["pml"].converged
        pml.append(res["pml"].estimate)
        logols.append(res["log"].estimate)
        covered.append(res["pml"].ci_low <= 0.3 <= res["pml"].ci_high)
    assert abs(np.mean(pml) - 0.3) < 0.03, np.mean(pml)
    assert abs(np.mean(logols) - 0.3) > 0.1, np.mean(logols)
    assert 0.85 <= np.mean(covered) <= 0.99, np.mean(covered)
