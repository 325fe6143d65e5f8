"""Benchmark: a staggered-adoption grid of 60 specifications (two-way least squares, the two-way event
study, the interaction-weighted, imputation and group-time estimators) on a 100,000-row panel, against
by-hand statsmodels fits with explicit dummy columns on a smaller panel (not a test).

Data (seeded, synthetic, INVENTED): ``--units`` units over ``--periods`` periods (6,250 x 16 =
100,000 rows), four adoption cohorts and never-treated units, effects growing with time since
adoption, one control. Grid: {two-way, event study, interaction-weighted, imputation} x {clustered
by unit, clustered by region, hc1} x {no control, c1}, plus group-time effects with never-treated and
not-yet-treated controls x the three covariance choices (999 multiplier-bootstrap draws each): 30
specifications, on two samples (all periods; from period 2).

Printed, from one run: fegrid's time for the grid (one process, ``fit_block`` per sample, every
coefficient kept); the by-hand statsmodels time per fit on ``--ref-units`` units (OLS with unit and
period dummies and binned relative-period indicators, clustered: the event study), scaled linearly
to the grid's rows and number of fits (a dummy-variable fit grows faster than linearly, so the ratio
is a lower bound); the ratio.

    python tests/benchmarks/bench_staggered.py
"""

from __future__ import annotations

import argparse
import itertools
import time

import numpy as np
import pandas as pd

from fegrid.absorb import parse_absorb
from fegrid.estimate import BlockSettings, Inference, SpecRequest, fit_block
from fegrid.estimators import parse_estimator

ESTIMATORS = {
    "two_way": {"method": "least_squares"},
    "event_study": {"method": "event_study", "window": [-4, 4]},
    "interaction_weighted": {"method": "interaction_weighted", "window": [-4, 4]},
    "imputation": {"method": "imputation", "window": [-4, 4]},
}
INFERENCE = {"unit": Inference("clustered", (("unit",),)), "region": Inference("clustered", (("region",),)),
             "hc1": Inference("hc1")}
CONTROLS = {"none": (), "c1": ("c1",)}
GROUP_TIME = {"group_time_never": {"method": "group_time", "uniform_band_draws": 999},
              "group_time_not_yet": {"method": "group_time", "controls_from": "not_yet_treated",
                                     "uniform_band_draws": 999}}


def panel(units: int, periods: int, seed: int = 1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    cohorts = np.array([4.0, 7.0, 10.0, 13.0, np.nan])
    adopt = cohorts[rng.integers(0, len(cohorts), units)]
    unit = np.repeat(np.arange(units), periods)
    period = np.tile(np.arange(1, periods + 1), units)
    a = adopt[unit]
    since = period - a
    treated = np.isfinite(a) & (since >= 0)
    effect = np.where(treated, 0.3 + 0.2 * np.nan_to_num(since), 0.0)
    c1 = rng.normal(size=len(unit))
    y = rng.normal(size=units)[unit] + 0.1 * period + effect + 0.2 * c1 + rng.normal(size=len(unit))
    return pd.DataFrame({"unit": unit, "period": period, "region": unit % 40, "d": treated.astype(float),
                         "adopt": a, "c1": c1, "y": y})


def specs() -> list[SpecRequest]:
    out = [SpecRequest(f"{e}|{i}|{c}", "y", "d", ctrl, inf, parse_estimator(e, body))
           for (e, body), (i, inf), (c, ctrl) in itertools.product(ESTIMATORS.items(), INFERENCE.items(),
                                                                   CONTROLS.items())]
    out += [SpecRequest(f"{e}|{i}|none", "y", "d", (), inf, parse_estimator(e, body))
            for (e, body), (i, inf) in itertools.product(GROUP_TIME.items(), INFERENCE.items())]
    return out


def fegrid_grid(frame: pd.DataFrame, requests: list[SpecRequest]) -> tuple[float, list]:
    settings = BlockSettings(absorb=parse_absorb(["unit", "period"]), unit="unit", time="period", treatment="d",
                             adoption="adopt")
    started = time.perf_counter()
    results = []
    for sample in (frame, frame[frame["period"] >= 2]):
        results += fit_block(sample, settings, requests).results
    return time.perf_counter() - started, results


def by_hand_event_study(frame: pd.DataFrame) -> float:
    """statsmodels OLS with unit and period dummies and binned relative-period indicators, clustered."""
    import statsmodels.formula.api as smf

    rel = (frame["period"] - frame["adopt"]).clip(-4, 4)
    data = frame.copy()
    names = []
    for k in range(-4, 5):
        if k != -1:
            name = f"r{k + 10}"
            data[name] = ((rel == k) & frame["adopt"].notna()).astype(float)
            names.append(name)
    fit = smf.ols("y ~ " + " + ".join(names) + " + C(unit) + C(period)", data=data).fit(
        cov_type="cluster", cov_kwds={"groups": data["unit"].to_numpy()})
    return float(fit.params[names[4:]].mean())


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--units", type=int, default=6250)
    parser.add_argument("--periods", type=int, default=16)
    parser.add_argument("--ref-units", type=int, default=500, help="units of the by-hand reference panel")
    parser.add_argument("--ref-fits", type=int, default=2)
    args = parser.parse_args()
    frame = panel(args.units, args.periods)
    requests = specs()
    ours, results = fegrid_grid(frame, requests)
    ok = sum(r.status == "ok" for r in results)
    small = panel(args.ref_units, args.periods, seed=2)
    started = time.perf_counter()
    for _ in range(args.ref_fits):
        by_hand_event_study(small)
    per_fit = (time.perf_counter() - started) / args.ref_fits
    # the dummy-variable fit grows at least linearly in the rows (its dummies grow with the units too)
    scaled = per_fit * len(frame) / len(small)
    print(f"rows: {len(frame):,}; specifications: {len(results)} ({ok} fitted)")
    print(f"fegrid, whole grid: {ours:.1f} s (target < 60 s on 2 cores)")
    print(f"by-hand statsmodels event study with dummies on {len(small):,} rows: {per_fit:.2f} s per fit; "
          f"scaled linearly to {len(frame):,} rows and {len(results)} fits: {scaled * len(results):.0f} s")
    print(f"ratio: {scaled * len(results) / ours:.0f}x")


if __name__ == "__main__":
    main()
