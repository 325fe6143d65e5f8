"""Shared fixtures: open datasets shipped by registry packages (never invented data)."""

from __future__ import annotations

import os
import sys
from pathlib import Path

import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="session")
def grunfeld() -> pd.DataFrame:
    """statsmodels' Grunfeld investment data: 11 US firms, 1935-1954."""
    sm = pytest.importorskip("statsmodels.api")
    g = sm.datasets.grunfeld.load_pandas().data
    g["firm"] = g["firm"].astype(str)
    g["year"] = g["year"].astype(int)
    return g


@pytest.fixture(scope="session")
def wage_panel() -> pd.DataFrame:
    """linearmodels' wage_panel: 545 young men, 1980-1987 (Vella & Verbeek 1998)."""
    return pytest.importorskip("linearmodels.datasets.wage_panel").load()


@pytest.fixture(scope="session")
def jobtraining() -> pd.DataFrame:
    """linearmodels' jobtraining: Michigan manufacturing firms, 1987-1989 (Holzer et al. 1993)."""
    return pytest.importorskip("linearmodels.datasets.jobtraining").load()


@pytest.fixture(scope="session")
def datasets(grunfeld, wage_panel, jobtraining) -> dict[str, pd.DataFrame]:
    return {"grunfeld": grunfeld, "wage_panel": wage_panel, "jobtraining": jobtraining}


@pytest.fixture()
def fegrid_env() -> dict[str, str]:
    """Environment for subprocess runs of fegrid / Snakemake with this interpreter first on PATH."""
    env = dict(os.environ)
    env["PATH"] = str(Path(sys.executable).parent) + os.pathsep + env.get("PATH", "")
    return env


TINY_CONFIG = """\
run_name: tiny
data: {path: grunfeld.csv, unit: firm, time: year}
outcomes: [invest]
focal_regressors: [value, capital]
absorb:
  firm: [firm]
  firm_year: [firm, year]
clustering:
  robust: {kind: hc1}
  firm: {kind: clustered, by: firm}
samples:
  all: {}
  postwar: {range: {year: {min: 1946}}}
control_sets:
  combinations_of: [capital, value]
baseline: {focal: value, absorb: firm_year, clustering: firm, sample: all, controls: capital}
jobs: {specs_per_job: 4}
joint_inference: {draws: 20, draws_per_job: 10, seed: 7}
"""


@pytest.fixture()
def tiny_project(tmp_path: Path, grunfeld: pd.DataFrame) -> Path:
    """A folder with statsmodels' Grunfeld data as CSV and a small grid over it."""
    grunfeld.to_csv(tmp_path / "grunfeld.csv", index=False)
    (tmp_path / "grid.yaml").write_text(TINY_CONFIG)
    return tmp_path
