"""Produce tests/reference/linearmodels_cases.json: reference fits from linearmodels.

Source: linearmodels (bashtage/linearmodels) ``PanelOLS`` and ``AbsorbingLS`` on open datasets
that packages ship: statsmodels' Grunfeld investment data (11 firms, 1935-1954), linearmodels'
``wage_panel`` (545 men, 1980-1987) and ``jobtraining`` (Michigan firms, 1987-1989).

Mapping of conventions: fegrid's iid / robust / cluster / twoway equal linearmodels'
``cov_type="unadjusted" / "robust" / "clustered"`` with ``debiased=True`` and, when clustered,
``group_debias=True``. linearmodels counts all effects in the degrees of freedom when the model has
more than one effect; fegrid leaves out effects nested in the cluster variable (Cameron & Miller
2015). The test multiplies by the exact conversion factor then, computed from both df counts.

Run from the repository root: ``python tests/reference/make_linearmodels_reference.py``.
"""

from __future__ import annotations

import json
from pathlib import Path

import linearmodels
import numpy as np
import pandas as pd
import statsmodels.api as sm
from linearmodels import AbsorbingLS, PanelOLS
from linearmodels.datasets import jobtraining, wage_panel

OUT = Path(__file__).with_name("linearmodels_cases.json")


def datasets() -> dict[str, pd.DataFrame]:
    g = sm.datasets.grunfeld.load_pandas().data
    g["firm"] = g["firm"].astype(str)
    g["year"] = g["year"].astype(int)
    w = wage_panel.load()
    j = jobtraining.load()
    return {"grunfeld": g, "wage_panel": w, "jobtraining": j}


CASES = [
    # name, data, unit, time, outcome, focal, controls, absorb, fegrid kind, cluster by, weights
    ("grunfeld-unit-iid", "grunfeld", "firm", "year", "invest", "value", ["capital"], ["firm"], "iid", [], None),
    ("grunfeld-unit-robust", "grunfeld", "firm", "year", "invest", "value", ["capital"], ["firm"], "robust", [], None),
    ("grunfeld-unit-cluster", "grunfeld", "firm", "year", "invest", "value", ["capital"], ["firm"], "cluster", ["firm"], None),
    ("grunfeld-unit-twoway", "grunfeld", "firm", "year", "invest", "capital", ["value"], ["firm"], "twoway", ["firm", "year"], None),
    ("grunfeld-twfe-iid", "grunfeld", "firm", "year", "invest", "value", ["capital"], ["firm", "year"], "iid", [], None),
    ("grunfeld-twfe-robust", "grunfeld", "firm", "year", "invest", "value", ["capital"], ["firm", "year"], "robust", [], None),
    ("grunfeld-twfe-cluster", "grunfeld", "firm", "year", "invest", "value", ["capital"], ["firm", "year"], "cluster", ["firm"], None),
    ("grunfeld-twfe-twoway", "grunfeld", "firm", "year", "invest", "capital", ["value"], ["firm", "year"], "twoway", ["firm", "year"], None),
    ("wage-twfe-cluster", "wage_panel", "nr", "year", "lwage", "union", ["married", "expersq"], ["nr", "year"], "cluster", ["nr"], None),
    ("wage-twfe-twoway", "wage_panel", "nr", "year", "lwage", "married", ["union", "expersq"], ["nr", "year"], "twoway", ["nr", "year"], None),
    ("wage-unit-weighted-robust", "wage_panel", "nr", "year", "lwage", "union", ["married", "expersq"], ["nr"], "robust", [], "hours"),
    ("wage-unit-weighted-cluster", "wage_panel", "nr", "year", "lwage", "union", ["married", "expersq"], ["nr"], "cluster", ["nr"], "hours"),
    ("jobtraining-twfe-cluster", "jobtraining", "fcode", "year", "lscrap", "grant", ["grant_1"], ["fcode", "year"], "cluster", ["fcode"], None),
    ("wage-absorb3-robust", "wage_panel", "nr", "year", "lwage", "union", ["married", "expersq"], ["nr", "year", "occupation"], "robust", [], None),
    ("wage-absorb3-iid", "wage_panel", "nr", "year", "lwage", "married", ["union", "expersq"], ["nr", "year", "occupation"], "iid", [], None),
]

LM_COV = {"iid": "unadjusted", "robust": "robust", "cluster": "clustered", "twoway": "clustered"}


def fit(case: tuple, frame: pd.DataFrame) -> dict:
    name, _, unit, time, y, x, controls, absorb, kind, by, weights = case
    cols = [unit, time, y, x, *controls, *[a for a in absorb if a not in (unit, time)]]
    if weights:
        cols.append(weights)
    df = frame[list(dict.fromkeys(cols))].dropna().copy()
    regressors = [x, *controls]
    kw: dict = {"cov_type": LM_COV[kind], "debiased": True}
    if len(absorb) <= 2 and set(absorb) <= {unit, time}:
        p = df.set_index([unit, time])
        model = PanelOLS(p[y], p[regressors], entity_effects=unit in absorb, time_effects=time in absorb,
                         weights=p[weights] if weights else None)
        if kind in ("cluster", "twoway"):
            kw["group_debias"] = True
            kw["cluster_entity"] = unit in by
            kw["cluster_time"] = time in by
        res = model.fit(**kw)
        call = f"PanelOLS(entity_effects={unit in absorb}, time_effects={time in absorb}).fit({kw})"
        n_effects = int(res.df_model) - len(regressors)
        if kind == "cluster" and absorb == by and len(absorb) == 1:
            n_effects = 0  # auto_df: a single effect nested in the clusters is not counted
    else:
        absorbed = pd.DataFrame({a: pd.Categorical(df[a]) for a in absorb})
        model = AbsorbingLS(df[y], df[regressors], absorb=absorbed)
        res = model.fit(**kw)
        call = f"AbsorbingLS(absorb={absorb}).fit({kw})"
        n_effects = int(res.df_model) - len(regressors)
    return {
        "case": name,
        "call": call,
        "estimate": float(res.params[x]),
        "std_error": float(res.std_errors[x]),
        "n_obs": int(res.nobs),
        "effects_df_counted_by_linearmodels": n_effects,
    }


def main() -> None:
    data = datasets()
    out = {
        "source": f"linearmodels {linearmodels.__version__}, numpy {np.__version__}",
        "cases": {c[0]: {**fit(c, data[c[1]]), "spec": dict(zip(
            ["name", "data", "unit", "time", "outcome", "focal", "controls", "absorb", "kind", "by",
             "weights"], c))} for c in CASES},
    }
    OUT.write_text(json.dumps(out, indent=2, sort_keys=True) + "\n")
    print(f"wrote {OUT} ({len(CASES)} cases)")


if __name__ == "__main__":
    main()
