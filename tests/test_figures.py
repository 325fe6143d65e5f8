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


def test_figure_labels_are_legible_at_print_size(wage_panel: pd.DataFrame, tmp_path: Path) -> None:
    """A grid shaped like a referee's request (five absorbed-effects choices, four clusterings, a
    leave-one-occupation-out family, four control sets) on linearmodels' wage_panel: every text of
    the figure is at least 7 pt once placed on the appendix's page (the 7-pt floor is common
    practice for printed figures), the family is one row, and the legend names only what is drawn."""
    import matplotlib.text

    from fegrid.figures import print_scale
    from fegrid.report import FIGURE_HEIGHT_SHARE, TEXT_HEIGHT_IN, TEXT_WIDTH_IN

    raw = wage_grid(tmp_path, wage_panel, focal_regressors=["union"],
                    absorb={"worker": ["nr"], "worker_year": ["nr", "year"], "pooled": [], "year": ["year"],
                            "worker_occupation": ["nr", "year", "occupation"]},
                    samples={"all": {}, "after_1981": {"range": {"year": {"min": 1982}}},
                             "balanced": {"balanced": True}, "without_occupation": {"drop_each": "occupation"}},
                    control_sets={"combinations_of": ["expersq", "hours"]})
    ledger = fit_in_process(raw, tmp_path)
    assert ledger["sample"].str.startswith("without_occupation:").sum() > 9 * 4
    fig = draw_curve(ledger, level=0.95)
    scale = print_scale(fig, TEXT_WIDTH_IN, FIGURE_HEIGHT_SHARE * TEXT_HEIGHT_IN)
    texts = [t for t in fig.findobj(matplotlib.text.Text) if t.get_text().strip()]
    smallest = min(t.get_fontsize() for t in texts)
    assert smallest * scale >= 7.0, (smallest, scale)
    labels = [t.get_text() for t in fig.axes[1].get_yticklabels()]
    family = [t for t in labels if t.startswith("without_occupation")]
    assert family == ["without_occupation (each of 9)"]
    legend = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert any(t.startswith("median ") for t in legend)
    est, p = ledger.loc[ledger["status"] == "ok", "estimate"], ledger.loc[ledger["status"] == "ok", "p_value"]
    assert any("negative" in t for t in legend) == bool(((est < 0) & (p < 0.05)).any())
    assert any("not significant" in t for t in legend) == bool((p >= 0.05).any())


def test_a_long_title_wraps_inside_the_figure() -> None:
    """Every choice fixed across a curve is named in the title, wrapped whole ("dimension = choice")
    and drawn inside the figure (a one-line title ran off the page once the estimator was named)."""
    import numpy as np
    import pandas as pd

    from fegrid.figures import draw_curve
    from fegrid.ledger import DIMENSIONS

    n = 6
    frame = pd.DataFrame({d: [f"a_long_choice_name_for_{d}"] * n for d in DIMENSIONS})
    frame = frame.assign(spec_id=[f"{i:012x}" for i in range(n)], absorb=[f"effects_{i % 2}" for i in range(n)],
                         estimate=np.linspace(-1, 1, n), ci_low=np.linspace(-2, 0, n), ci_high=np.linspace(0, 2, n),
                         p_value=0.01, status="ok", is_baseline=False, curve="poisson_pml", estimator="poisson")
    fig = draw_curve(frame)
    fig.canvas.draw()
    drawn = fig.get_tightbbox(fig.canvas.get_renderer())  # inches, every artist, the title included
    assert drawn.x1 <= fig.get_figwidth() + 1e-6 and drawn.y1 <= fig.get_figheight() + 1e-6
    title = fig.axes[0].get_title(loc="left")
    assert title.count("\n") >= 2 and "estimator = poisson" in title
    assert "semi-elasticity" in fig.axes[0].get_ylabel()
