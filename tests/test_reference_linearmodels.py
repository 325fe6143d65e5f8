"""fegrid against linearmodels (PanelOLS, AbsorbingLS) on open datasets that packages ship.

Source of every number: tests/reference/linearmodels_cases.json, written by the script beside it
(tests/reference/make_linearmodels_reference.py) from linearmodels' PanelOLS and AbsorbingLS on
statsmodels' Grunfeld data and linearmodels' wage_panel and jobtraining. Mapping of conventions:
fegrid iid/robust/cluster/twoway = linearmodels unadjusted/robust/clustered with debiased=True and
group_debias=True. Where linearmodels counts absorbed effects in the df that fegrid leaves out
(effects nested in the cluster variable; Cameron & Miller 2015), or counts an upper bound of the
rank of three effects where fegrid counts the exact rank, the test applies the exact factor
sqrt((N - k - A_fegrid) / (N - k - A_linearmodels)), applied to fegrid's SE.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

from fegrid import covariance, estimate
from fegrid.absorb import parse_absorb
from fegrid.estimate import Inference, fit_one
from fegrid.renames import KIND_RENAMES

REFERENCE = json.loads((Path(__file__).parent / "reference" / "linearmodels_cases.json").read_text())
CASES = REFERENCE["cases"]


def _fit(case: dict, datasets: dict):
    spec = case["spec"]
    frame = datasets[spec["data"]]
    inference = Inference(KIND_RENAMES[spec["kind"]], tuple((b,) for b in spec["by"]))  # 0.2 names in the file
    return fit_one(frame, spec["outcome"], spec["focal"], controls=spec["controls"],
                   absorb=parse_absorb(spec["absorb"]), inference=inference, weights=spec["weights"],
                   unit=spec["unit"], time=spec["time"])


@pytest.mark.parametrize("name", sorted(CASES))
def test_matches_linearmodels(name: str, datasets: dict) -> None:
    """Source: linearmodels PanelOLS / AbsorbingLS (reference JSON; call recorded in each case)."""
    case = CASES[name]
    res = _fit(case, datasets)
    assert res.status == "ok", res.message
    assert res.n_obs == case["n_obs"]
    assert res.estimate == pytest.approx(case["estimate"], rel=1e-8)
    k = 1 + len(case["spec"]["controls"])
    n = res.n_obs
    ours = _counted(res, case)
    factor = math.sqrt((n - k - ours) / (n - k - case["effects_df_counted_by_linearmodels"]))
    assert res.std_error * factor == pytest.approx(case["std_error"], rel=1e-6)


@pytest.mark.parametrize("name", sorted(CASES))
def test_matches_linearmodels_with_the_qr_in_chunks(name: str, datasets: dict, monkeypatch) -> None:
    """Source: as above. The same cases with the R factor taken from row chunks of 64 (as on data of
    more than 32,768 rows), and the residuals and cluster sums from row chunks of 37 (as on data of more
    than 16,384 rows; 37 rows cut the panels' units and periods anywhere): the chunked (tall-and-skinny)
    QR and the chunked sums give the same estimates and SEs."""
    monkeypatch.setattr(estimate, "QR_CHUNK", 64)
    monkeypatch.setattr(covariance, "FUSED_CHUNK", 37)
    case = CASES[name]
    res = _fit(case, datasets)
    assert res.status == "ok", res.message
    assert res.estimate == pytest.approx(case["estimate"], rel=1e-8)
    k, n = 1 + len(case["spec"]["controls"]), res.n_obs
    factor = math.sqrt((n - k - _counted(res, case)) / (n - k - case["effects_df_counted_by_linearmodels"]))
    assert res.std_error * factor == pytest.approx(case["std_error"], rel=1e-6)


def _counted(res, case) -> int:
    """Absorbed df that fegrid's small-sample factor counts for this case (see covariance.py)."""
    spec = case["spec"]
    if spec["kind"] in ("iid", "robust"):
        return res.absorbed_df
    # effects nested in every cluster variable are not counted; in these datasets an effect is
    # nested in a cluster variable exactly when it is that variable (firms, workers, plants)
    nested = [a for a in spec["absorb"] if all(a == b for b in spec["by"])]
    if not nested:
        return res.absorbed_df
    levels = dict(item.split("=") for item in res.absorb_levels.split("; "))
    return max(res.absorbed_df - sum(int(levels[a]) for a in nested), 0)


def test_conversion_factor_is_exact_for_nested_unit_effects(datasets: dict) -> None:
    """Source: linearmodels PanelOLS, Grunfeld, unit + time effects, clustered by firm.

    linearmodels counts all 11 + 20 - 1 = 30 effect df; fegrid leaves out the 11 firm effects
    nested in the firm clusters: the SEs differ by exactly sqrt((220-2-30)/(220-2-19)).
    """
    case = CASES["grunfeld-twfe-cluster"]
    res = _fit(case, datasets)
    assert res.absorbed_df == 30
    assert case["effects_df_counted_by_linearmodels"] == 30
    assert res.std_error / case["std_error"] == pytest.approx(math.sqrt(188 / 199), rel=1e-9)


def test_reference_file_still_matches_live_linearmodels(datasets: dict) -> None:
    """Source: linearmodels itself, rerun now: the committed reference numbers are not stale."""
    pytest.importorskip("linearmodels")
    import importlib.util
    import sys

    path = Path(__file__).parent / "reference" / "make_linearmodels_reference.py"
    spec = importlib.util.spec_from_file_location("make_ref", path)
    module = importlib.util.module_from_spec(spec)
    sys.modules["make_ref"] = module
    spec.loader.exec_module(module)
    for row in module.CASES:
        live = module.fit(row, datasets[row[1]])
        assert live["estimate"] == pytest.approx(CASES[row[0]]["estimate"], rel=1e-10)
        assert live["std_error"] == pytest.approx(CASES[row[0]]["std_error"], rel=1e-8)
