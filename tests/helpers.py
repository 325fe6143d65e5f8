"""Shared helpers of the report tests: a grid over linearmodels' wage_panel (an open dataset),
fitted in-process with the functions the Snakemake rules call, and the appendix built from it."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pandas as pd
import pytest

import fegrid
from fegrid.figures import draw_curve, pair_slug, save_curve
from fegrid.grid import load_config
from fegrid.report import figure_names, render_appendix
from fegrid.tables import grid_tables, latex_table

NEEDS_TEX = pytest.mark.skipif(
    shutil.which("pdflatex") is None and os.environ.get("CI") != "true",
    reason="pdflatex is not installed (CI installs it and runs these tests)",
)


def training_panel() -> pd.DataFrame:
    """linearmodels' jobtraining panel (an open dataset: training grants to Michigan manufacturing firms,
    1987-1989) as a staggered adoption: a firm is treated from its first grant on (``trained``), adopting in
    ``grant_year``. Firms with a missing outcome are dropped; the last year of five firms too, so that only
    the sample 'balanced' is."""
    from linearmodels.datasets import jobtraining

    d = jobtraining.load().sort_values(["fcode", "year"]).reset_index(drop=True)
    d["trained"] = d.groupby("fcode")["grant"].cummax()
    first = d[d["trained"] == 1].groupby("fcode")["year"].min()
    d["grant_year"] = d["fcode"].map(first)
    d = d[d.groupby("fcode")["lhrsemp"].transform(lambda v: v.notna().all())]
    gone = d["fcode"].drop_duplicates().iloc[:5]
    d = d[~(d["fcode"].isin(gone) & (d["year"] == 1989))]
    return d[["fcode", "year", "trained", "grant_year", "lhrsemp", "lemploy", "union"]]


def wage_grid(tmp: Path, wage_panel: pd.DataFrame, **extra) -> dict:
    wage_panel.to_csv(tmp / "wage.csv", index=False)
    raw = {
        "run_name": "wage",
        "data": {"path": str(tmp / "wage.csv"), "unit": "nr", "time": "year"},
        "outcomes": ["lwage"],
        "focal_regressors": ["union", "married"],
        "absorb": {"worker": ["nr"], "worker_year": ["nr", "year"], "pooled": [],
                   "worker_occupation": ["nr", "year", "occupation"]},
        "clustering": {"robust": {"kind": "hc1"}, "worker": {"kind": "clustered", "by": "nr"},
                       "iid": {"kind": "homoskedastic"},
                       "two_way": {"kind": "two_way_clustered", "by": ["nr", "year"]}},
        "samples": {"all": {}, "after_1981": {"range": {"year": {"min": 1982}}},
                    "not_1987": {"drop": {"year": [1987]}}, "balanced": {"balanced": True}},
        "control_sets": {"combinations_of": ["expersq", "hours", "black", "union", "married"]},
        "joint_inference": {"draws": 0},
    }
    raw.update(extra)
    return raw


def fit_in_process(raw: dict, folder: Path) -> pd.DataFrame:
    """The grid fitted with the same functions the Snakemake rules call."""
    with pytest.MonkeyPatch.context() as mp:  # the tests' one way of changing folder
        mp.chdir(folder)
        return fegrid.fit_grid(raw, cache="reports", progress=False).ledger


def build_appendix(folder: Path, ledger: pd.DataFrame, raw: dict) -> Path:
    grid = load_config(raw)
    figures = figure_names(ledger)
    for rel, (outcome, focal) in zip(figures, sorted({tuple(x) for x in ledger[["outcome", "focal"]].to_numpy()})):
        part = ledger[(ledger["outcome"] == outcome) & (ledger["focal"] == focal)]
        save_curve(draw_curve(part), folder / rel.replace(".pdf", ".png"), folder / rel)
        assert rel.endswith(f"curve-{pair_slug(outcome, focal)}.pdf")
    joint = pd.DataFrame([{"outcome": "lwage", "focal": "union", "statistic": "median_estimate", "observed": 0.07,
                           "p_value": 0.0, "draws": 10, "specs": 5, "dominant_sign": "+"}])
    tables = [latex_table(t) for t in grid_tables(grid, ledger).values()]  # the config's, or the default one
    return render_appendix(grid, ledger, joint, figures, folder / "appendix.tex", draws=10, seed=1,
                           resample="nr", tables=tables)


