"""Results tables on linearmodels' wage_panel (an open dataset): every cell against the ledger and
against pandas computed directly, significance marks and labels from the config, the three
formats, and a column that names no specification refused before fitting."""

from __future__ import annotations

from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from helpers import wage_grid

import fegrid
from fegrid.errors import ConfigError
from fegrid.pipeline import make_plan
from fegrid.tables import Significance, grid_tables, html_table, latex_table, markdown_table


def _raw(tmp: Path, wage_panel: pd.DataFrame, **extra) -> dict:
    raw = wage_grid(tmp, wage_panel, focal_regressors=["union", "married"],
                    absorb={"worker": ["nr"], "worker_year": ["nr", "year"], "pooled": []},
                    clustering={"worker": {"kind": "clustered", "by": "nr"}, "hc1": {"kind": "hc1"}},
                    samples={"all": {}, "after_1981": {"range": {"year": {"min": 1982}}}},
                    control_sets={"named": {"none": [], "hours": ["hours"]}},
                    baseline={"focal": "union", "absorb": "worker_year", "clustering": "worker", "sample": "all",
                              "controls": "hours"})
    raw["tables"] = {"main": {"columns": [{}, {"absorb": "worker"}, {"absorb": "pooled", "clustering": "hc1"},
                                          {"sample": "after_1981"}, {"focal": "married"}],
                              "show_controls": ["hours"], "notes": "Invented note for the test."}}
    raw.update(extra)
    return raw


def test_every_cell_comes_from_the_ledger(tmp_path: Path, wage_panel: pd.DataFrame) -> None:
    raw = _raw(tmp_path, wage_panel)
    result = fegrid.fit_grid(raw, progress=False)
    table = grid_tables(result._plan.grid, result.ledger)["main"]
    led = result.ledger.set_index("spec_id")
    rows = {(r.label, r.kind): r.cells for r in table.rows}
    sig = Significance.from_config(raw)
    for j, sid in enumerate(table.spec_ids):
        spec = led.loc[sid]
        row = "union" if spec["focal"] == "union" else "married"
        est = rows[(row, "coef")][j]
        assert est == f"{spec['estimate']:.4f}" + sig.marks(spec["p_value"])
        se_row = [r for r in table.rows if r.kind == "se"][0 if row == "union" else 1]
        assert se_row.cells[j] == f"({spec['std_error']:.4f})"
        assert rows[("Observations", "count")][j] == f"{int(spec['n_obs']):,}"
    # the columns are the specifications asked for: the baseline, then one change each
    assert [led.loc[s, "absorb"] for s in table.spec_ids] == ["worker_year", "worker", "pooled", "worker_year",
                                                             "worker_year"]
    assert led.loc[table.spec_ids[2], "clustering"] == "hc1" and led.loc[table.spec_ids[3], "sample"] == "after_1981"
    assert rows[("nr effects", "text")] == ("Yes", "Yes", "No", "Yes", "Yes")
    assert rows[("year effects", "text")] == ("Yes", "No", "No", "Yes", "Yes")
    assert rows[("hours (control)", "text")] == ("Yes",) * 5 and ("Controls", "text") not in rows
    assert rows[("Clustering", "text")] == ("nr", "nr", "none (HC1)", "nr", "nr")
    # the outcome's mean and SD in the estimation sample, by pandas (wage_panel is balanced: no singletons)
    late = wage_panel[wage_panel["year"] >= 1982]
    assert rows[("Mean of outcome", "stat")][0] == f"{wage_panel['lwage'].mean():.4f}"
    assert rows[("Mean of outcome", "stat")][3] == f"{late['lwage'].mean():.4f}"
    assert rows[("SD of outcome", "stat")][3] == f"{late['lwage'].std(ddof=1):.4f}"
    assert np.isclose(led.loc[table.spec_ids[3], "outcome_sd"], late["lwage"].std(ddof=1), rtol=1e-12)
    assert "* p < 0.1, ** p < 0.05, *** p < 0.01" in table.notes[0] and "Invented note" in " ".join(table.notes)


def test_marks_and_labels_follow_the_config(tmp_path: Path, wage_panel: pd.DataFrame) -> None:
    raw = _raw(tmp_path, wage_panel, significance={"levels": [0.05, 0.001], "symbols": ["+", "#"]},
               labels={"union": "Union member", "lwage": "Log wage", "nr": "Worker"})
    result = fegrid.fit_grid(raw, progress=False)
    table = grid_tables(result._plan.grid, result.ledger)["main"]
    led = result.ledger.set_index("spec_id")
    coef = next(r for r in table.rows if r.kind == "coef")
    assert coef.label == "Union member" and table.outcomes[0] == "Log wage"
    for j, sid in enumerate(table.spec_ids[:4]):
        p = led.loc[sid, "p_value"]
        assert coef.cells[j].endswith("#" if p < 0.001 else "+" if p < 0.05 else "") and "*" not in coef.cells[j]
    assert "Worker effects" in [r.label for r in table.rows]
    assert "+ p < 0.05, # p < 0.001" in table.notes[0]
    assert set(result.ledger["focal"]) == {"union", "married"}  # the ledger keeps the raw names
    bare = fegrid.fit_grid({**raw, "significance": {"levels": [], "symbols": []}}, progress=False)
    none = grid_tables(bare._plan.grid, result.ledger)["main"]
    assert "no significance marks" in none.notes[0]
    assert not any(ch in "".join(next(r for r in none.rows if r.kind == "coef").cells) for ch in "+#*")


class _Cells(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.rows: list[list[str]] = []
        self.tags: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        if tag == "tr":
            self.rows.append([])

    def handle_data(self, data):
        if self.rows and self.tags and self.tags[-1] in ("td", "th"):
            self.rows[-1].append(data)

    def handle_endtag(self, tag):
        self.tags.pop()


def test_the_three_formats_hold_the_same_table(tmp_path: Path, wage_panel: pd.DataFrame) -> None:
    raw = _raw(tmp_path, wage_panel, labels={"union": "R&D <share> | 100%"})
    result = fegrid.fit_grid(raw, progress=False)
    table = grid_tables(result._plan.grid, result.ledger)["main"]
    md, tex, page = markdown_table(table), latex_table(table), html_table(table)
    parser = _Cells()
    parser.feed(page)
    assert parser.tags == []  # every tag closed
    body = [r for r in parser.rows if r and r[0] == "R&D <share> | 100%"]
    coef = next(r for r in table.rows if r.kind == "coef")
    assert body and body[0][1:] == [c for c in coef.cells if c]
    assert r"R&D &lt;share&gt; \| 100%" in md and md.count("\n| ") >= len(table.rows)
    assert r"0.\*" not in md and r"\*\*\*" in md  # marks are escaped, not read as emphasis
    assert r"R\&D \textless{}share\textgreater{} | 100\%" in tex
    assert r"\begin{threeparttable}" in tex and r"\toprule" in tex and "S[table-format=" in tex


def test_a_column_that_names_no_specification_is_refused_before_fitting(tmp_path: Path, wage_panel) -> None:
    raw = _raw(tmp_path, wage_panel)
    raw["tables"]["main"]["columns"].append({"absorb": "worker_typo"})
    with pytest.raises(ConfigError, match=r"tables\.main\.columns\[6\] \(absorb: worker_typo"):
        make_plan(raw)
    raw["tables"]["main"]["columns"][-1] = {"colour": "blue"}
    with pytest.raises(ConfigError, match="unknown dimension"):
        make_plan(raw)


def test_without_show_controls_a_row_names_each_columns_controls(tmp_path: Path, wage_panel: pd.DataFrame) -> None:
    """A table that names no control to show still says which controls each column holds (the control set's
    columns, labelled, or "none"), each dropped one with the ledger's reason: experience is absorbed by
    worker and year effects (it rises by one a year for everyone in wage_panel) but not by worker effects
    alone."""
    raw = _raw(tmp_path, wage_panel, labels={"hours": "Annual hours"})
    raw["control_sets"] = {"named": {"none": [], "hours_exper": ["hours", "exper"]}}
    raw["baseline"]["controls"] = "hours_exper"
    raw["tables"] = {"main": {"columns": [{}, {"controls": "none"}, {"absorb": "worker"}]}}
    result = fegrid.fit_grid(raw, progress=False)
    table = grid_tables(result._plan.grid, result.ledger)["main"]
    rows = {(r.label, r.kind): r.cells for r in table.rows}
    assert result.ledger.set_index("spec_id").loc[table.spec_ids[0], "controls_dropped"] == "exper (absorbed)"
    assert rows[("Controls", "text")] == ("Annual hours, exper (absorbed)", "none", "Annual hours, exper")
    assert "| Controls | Annual hours, exper (absorbed) | none | Annual hours, exper |" in markdown_table(table)


def test_show_controls_reads_a_named_sets_columns(tmp_path: Path, wage_panel: pd.DataFrame) -> None:
    """A named control set (`full: [hours, married]`) holds the controls it lists, whatever its name: its
    columns get Yes (before: the set's name was split at '+', so `full` held no control and every row read
    No)."""
    raw = _raw(tmp_path, wage_panel)
    raw["control_sets"] = {"named": {"none": [], "full": ["hours", "exper"]}}
    raw["baseline"]["controls"] = "full"
    raw["tables"] = {"main": {"columns": [{}, {"controls": "none"}], "show_controls": ["hours", "exper"]}}
    result = fegrid.fit_grid(raw, progress=False)
    rows = {(r.label, r.kind): r.cells for r in grid_tables(result._plan.grid, result.ledger)["main"].rows}
    assert rows[("hours (control)", "text")] == ("Yes", "No") and rows[("exper (control)", "text")] == ("Yes", "No")
