"""The Python API (fegrid.fit_grid) on linearmodels' wage_panel (an open dataset): the same
ledger as the pipeline's steps run on a file, a DataFrame accepted as data, the cache reused, and
a user's mistake reported as one paragraph (never a DataFrame's repr)."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
from helpers import fit_in_process, wage_grid

import fegrid
from fegrid.absorb import parse_absorb
from fegrid.estimate import Inference, fit_one


def _small(tmp: Path, wage_panel: pd.DataFrame) -> dict:
    return wage_grid(tmp, wage_panel, focal_regressors=["union"],
                     control_sets={"named": {"none": [], "hours": ["hours"]}},
                     absorb={"worker": ["nr"], "worker_year": ["nr", "year"]},
                     clustering={"worker": {"kind": "clustered", "by": "nr"}, "robust": {"kind": "hc1"}},
                     samples={"all": {}, "after_1981": {"range": {"year": {"min": 1982}}}},
                     baseline={"absorb": "worker", "controls": "none", "clustering": "worker", "sample": "all"})


def test_a_dataframe_gives_the_ledger_of_the_file(tmp_path: Path, wage_panel: pd.DataFrame) -> None:
    raw = _small(tmp_path, wage_panel)
    (tmp_path / "run").mkdir()
    from_file = fit_in_process(raw, tmp_path / "run")
    result = fegrid.fit_grid(raw, data=wage_panel, progress=False)
    assert isinstance(result, fegrid.GridResult)
    assert len(result.ledger) == len(from_file) == 16
    cols = ["spec_id", "estimate", "std_error", "p_value", "n_obs"]
    pd.testing.assert_frame_equal(result.ledger[cols], from_file[cols])
    assert result.metadata["specifications"] == 16 and result.metadata["fegrid_version"] == fegrid.__version__
    assert result.metadata["run_folder"] is None  # a temporary folder, gone with the object
    # the baseline against a direct fit (the engine's own reference tests check fit_one against
    # linearmodels PanelOLS on this dataset)
    base = result.ledger[result.ledger["is_baseline"]].iloc[0]
    direct = fit_one(wage_panel, "lwage", base["focal"], controls=[], absorb=parse_absorb(["nr"]),
                     inference=Inference("clustered", (("nr",),)))
    assert base["absorb"] == "worker" and base["controls"] == "none"
    assert base["estimate"] == pytest.approx(direct.estimate, rel=1e-12)
    assert base["std_error"] == pytest.approx(direct.std_error, rel=1e-12)


def test_the_cache_folder_is_reused(tmp_path: Path, wage_panel: pd.DataFrame, capsys) -> None:
    raw = _small(tmp_path, wage_panel)
    first = fegrid.fit_grid(raw, data=wage_panel, cache=tmp_path / "cache")
    err = capsys.readouterr().err
    assert "16 specifications" in err and "16 specifications fitted, 0 reused" in err.replace("job 1 of 1: ", "")
    second = fegrid.fit_grid(raw, data=wage_panel.copy(), cache=tmp_path / "cache")
    assert "0 specifications fitted, 16 reused" in capsys.readouterr().err
    pd.testing.assert_frame_equal(first.ledger, second.ledger)
    assert Path(second.metadata["run_folder"], "ledger.csv").is_file()


def test_summary_figure_tables_and_joint_tests(tmp_path: Path, wage_panel: pd.DataFrame) -> None:
    raw = _small(tmp_path, wage_panel)
    raw["joint_inference"] = {"draws": 4, "draws_per_job": 2, "seed": 7}
    result = fegrid.fit_grid(raw, data=wage_panel, progress=False)
    summary = result.summary()
    assert summary["specs"].tolist() == [16]
    assert summary["median"].iloc[0] == pytest.approx(result.ledger["estimate"].median())
    fig = result.figure()
    assert len(fig.axes) >= 2
    md, tex = result.table("markdown"), result.table("latex")
    assert "lwage" in md and r"\toprule" in tex and r"\bottomrule" in tex
    joint = result.joint_tests()
    assert set(joint["statistic"]) == {"median_estimate", "share_significant", "stouffer_z"}
    assert (joint["draws"] == 4).all()
    with pytest.raises(fegrid.FegridError, match="formats are"):
        result.table("html5")
    # every kept coefficient: the focal rows are the ledger's estimates and standard errors
    coefs = result.coefficients()
    focal = coefs[coefs["position"] == 0].set_index("spec_id")
    ok = result.ledger[result.ledger["status"] == "ok"].set_index("spec_id")
    assert set(focal.index) == set(ok.index)
    pd.testing.assert_series_equal(focal.loc[ok.index, "estimate"], ok["estimate"], rtol=1e-12)
    pd.testing.assert_series_equal(focal.loc[ok.index, "std_error"], ok["std_error"], rtol=1e-9)


def test_a_mistake_is_one_paragraph(tmp_path: Path, wage_panel: pd.DataFrame) -> None:
    raw = _small(tmp_path, wage_panel)
    raw["outcomes"] = ["lwage_typo"]
    with pytest.raises(fegrid.FegridError) as info:
        fegrid.fit_grid(raw, data=wage_panel, progress=False)
    text = str(info.value)
    assert "lwage_typo" in text and "\n" not in text.strip() and "nr  year" not in text
