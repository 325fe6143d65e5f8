"""The specification-curve figure. Data: a grid over linearmodels' wage_panel (tests/helpers.py)."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
from helpers import fit_in_process, wage_grid

from fegrid.figures import draw_curve, save_curve


@pytest.fixture(scope="module")
def wage_ledger(tmp_path_factory, wage_panel) -> pd.DataFrame:
    folder = tmp_path_factory.mktemp("wage")
    return fit_in_process(wage_grid(folder, wage_panel), folder)


@pytest.mark.parametrize("size", [10, 1000])
def test_figure_renders_and_panels_share_x(size: int, wage_ledger: pd.DataFrame, tmp_path: Path) -> None:
    """Source: a grid fitted on linearmodels' wage_panel (union and married on log wages)."""
    part = wage_ledger[wage_ledger["focal"] == "union"]
    if size == 10:
        part = part.head(10)
    else:
        part = pd.concat([part, wage_ledger[wage_ledger["focal"] == "married"]]).assign(focal="union")
        part = part.head(size)
    assert len(part) == size
    fig = draw_curve(part, level=0.95)
    top, bottom = fig.axes[0], fig.axes[1]
    assert top.get_shared_x_axes().joined(top, bottom)
    assert top.get_xlim() == bottom.get_xlim()
    n_ok = int((part["status"] == "ok").sum())
    assert bottom.get_xlim()[0] < 0 < n_ok - 1 < bottom.get_xlim()[1]
    labels = [t.get_text() for t in bottom.get_yticklabels()]
    varying = [d for d in ("absorb", "clustering", "sample", "controls") if part[d].nunique() > 1]
    ok = part[part["status"] == "ok"]
    assert len(labels) == sum(ok[d].nunique() for d in varying if ok[d].nunique() > 1)
    png, pdf = tmp_path / "c.png", tmp_path / "c.pdf"
    save_curve(fig, png, pdf)
    assert png.stat().st_size > 10_000 and pdf.read_bytes()[:4] == b"%PDF"
