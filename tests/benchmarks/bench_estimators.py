"""Benchmark: fegrid's 2SLS and Poisson PML grid against a loop of linearmodels IV2SLS and statsmodels
GLM fits with dummy columns (not a test).

Data (seeded, synthetic): a balanced panel of ``--units`` units over ``--periods`` periods (100,000
rows by default), an endogenous regressor x with an instrument z, a count outcome with zeros and two
controls. Grid (24 specifications): {2SLS, Poisson PML} x {unit, unit + time effects} x {hc1,
clustered by unit} x {no controls, c1, c1 + c2}.

Printed, from one run: fegrid's time for the grid (one process, ``fit_block`` per absorbed-effects
choice, every coefficient kept); the alternative's time per fit, measured on ``--ref-fits`` fits of
each estimator and multiplied by the grid's 24; the ratio; the largest relative differences of the
focal estimates on the fits both made.

    python tests/benchmarks/bench_estimators.py
"""

from __future__ import annotations

import argparse
import itertools
import time

import numpy as np
import pandas as pd

from fegrid.absorb import parse_absorb
from fegrid.estimate import BlockSettings, Inference, SpecRequest, fit_block
from fegrid.estimators import Estimator

ESTIMATORS = {"iv": Estimator("two_stage_least_squares", ("z",)), "pml": Estimator("poisson_pml")}
ABSORB = {"unit": ["unit"], "unit_time": ["unit", "time"]}
CLUSTERS = {"hc1": Inference("hc1"), "unit": Inference("clustered", (("unit",),))}
CONTROLS = {"none": (), "c1": ("c1",), "c1c2": ("c1", "c2")}


def panel(units: int, periods: int, seed: int = 1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    n = units * periods
    unit = np.repeat(np.arange(units), periods)
    a = rng.normal(size=units)[unit]
    z, u = rng.normal(size=n), rng.normal(size=n)
    c1, c2 = rng.normal(size=n), rng.normal(size=n)
    x = 0.7 * z + 0.5 * u + 0.3 * a + 0.2 * c1
    y = 0.4 * x + a + u + 0.1 * c2 + rng.normal(size=n)
    count = rng.poisson(np.exp(-1.0 + 0.3 * x + 0.5 * a + 0.1 * c1)).astype(float)
    return pd.DataFrame({"unit": unit, "time": np.tile(np.arange(periods), units), "x": x, "z": z, "c1": c1,
                         "c2": c2, "y": y, "count": count})


def fegrid_grid(frame: pd.DataFrame) -> tuple[float, dict[tuple, float]]:
    started = time.perf_counter()
    estimates = {}
    for absorb in ABSORB:
        settings = BlockSettings(absorb=parse_absorb(ABSORB[absorb]), unit="unit", time="time")
        specs = []
        for (est, e), (cl, inf), (cs, ctrl) in itertools.product(ESTIMATORS.items(), CLUSTERS.items(),
                                                                 CONTROLS.items()):
            outcome = "count" if est == "pml" else "y"
            specs.append(SpecRequest(f"{est}|{absorb}|{cl}|{cs}", outcome, "x", ctrl, inf, e))
        for r in fit_block(frame, settings, specs).results:
            estimates[tuple(r.spec_id.split("|"))] = r.estimate
    return time.perf_counter() - started, estimates


def reference_fit(frame: pd.DataFrame, est: str, absorb: str, cluster: str, controls: tuple[str, ...]) -> float:
    import statsmodels.api as sm
    from linearmodels.iv import IV2SLS

    dummies = pd.get_dummies(frame[ABSORB[absorb]].astype(str), drop_first=True).astype(float)
    exog = pd.concat([pd.Series(1.0, index=frame.index, name="const"), frame[list(controls)], dummies], axis=1)
    if est == "iv":
        kwargs = {"cov_type": "robust"} if cluster == "hc1" else {"cov_type": "clustered", "clusters": frame["unit"]}
        return float(IV2SLS(frame["y"], exog, frame[["x"]], frame[["z"]]).fit(**kwargs).params["x"])
    # fegrid drops units whose counts are all zero (their effects diverge); so does the reference here
    keep = frame.groupby("unit")["count"].transform("sum") > 0
    sub, xs = frame[keep], pd.concat([frame[["x"]], exog], axis=1)[keep]
    kwargs = {"cov_type": "HC0"} if cluster == "hc1" else {"cov_type": "cluster",
                                                           "cov_kwds": {"groups": sub["unit"].to_numpy()}}
    return float(sm.GLM(sub["count"], xs, family=sm.families.Poisson()).fit(**kwargs).params["x"])


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--units", type=int, default=500)
    parser.add_argument("--periods", type=int, default=200)
    parser.add_argument("--ref-fits", type=int, default=2, help="reference fits timed per estimator")
    args = parser.parse_args()
    frame = panel(args.units, args.periods)
    ours, estimates = fegrid_grid(frame)
    n_specs = len(estimates)
    picks = [("iv", "unit_time", "unit", "c1c2"), ("iv", "unit", "hc1", "none"),
             ("pml", "unit_time", "unit", "c1c2"), ("pml", "unit", "hc1", "none")]
    chosen = [p for est in ESTIMATORS for p in picks if p[0] == est][: 2 * args.ref_fits]
    started = time.perf_counter()
    diffs = []
    for est, absorb, cluster, controls in chosen:
        ref = reference_fit(frame, est, absorb, cluster, CONTROLS[controls])
        ours_est = estimates[(est, absorb, cluster, controls)]
        diffs.append(abs(ours_est - ref) / max(abs(ref), 1e-300))
    per_fit = (time.perf_counter() - started) / len(chosen)
    print(f"rows: {len(frame):,}; specifications: {n_specs}")
    print(f"fegrid, whole grid: {ours:.2f} s")
    print(f"reference (linearmodels IV2SLS / statsmodels GLM with dummies): {per_fit:.2f} s per fit "
          f"({len(chosen)} fits timed) -> {per_fit * n_specs:.1f} s for the grid")
    print(f"ratio: {per_fit * n_specs / ours:.1f}x (target >= 50x)")
    print(f"largest relative difference of the focal estimate: {max(diffs):.2e}")


if __name__ == "__main__":
    main()
