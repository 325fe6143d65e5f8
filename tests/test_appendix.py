"""The LaTeX appendix: it compiles alone and inside a paper, with any names, to identical bytes.
Data: a grid over linearmodels' wage_panel (tests/helpers.py)."""

from __future__ import annotations

import subprocess
from pathlib import Path

import pandas as pd
import pytest
from helpers import NEEDS_TEX, build_appendix, fit_in_process, wage_grid

from fegrid.report import compile_latex, latex_escape


@pytest.fixture(scope="module")
def wage_ledger(tmp_path_factory, wage_panel) -> pd.DataFrame:
    folder = tmp_path_factory.mktemp("wage")
    return fit_in_process(wage_grid(folder, wage_panel), folder)


@NEEDS_TEX
def test_appendix_compiles_alone_and_inside_a_paper(wage_ledger, wage_panel, tmp_path: Path) -> None:
    tex = build_appendix(tmp_path, wage_ledger, wage_grid(tmp_path, wage_panel))
    pdf = compile_latex(tex, tmp_path / "appendix.pdf")
    text = subprocess.run(["pdftotext", "-layout", str(pdf), "-"], capture_output=True, text=True).stdout
    base = wage_ledger[wage_ledger["is_baseline"]].iloc[0]
    assert f"{base['estimate']:.4f}" in text  # the baseline as printed in the ledger, to 4 decimals
    assert "Every specification" in text
    # the results table (the default one: the baseline, then each other absorbed-effects choice)
    assert "Table 1: Estimates of" in text and "Observations" in text and f"({base['std_error']:.4f})" in text
    paper = tmp_path / "paper.tex"
    paper.write_text("\\documentclass{article}\\usepackage{booktabs,longtable,graphicx,siunitx,threeparttable}"
                     "\\begin{document}\n"
                     "Main text.\\newcommand{\\fegriddir}{./}\\input{appendix.tex}\n\\end{document}\n")
    compiled = compile_latex(paper, tmp_path / "paper.pdf")
    assert "Main text." in subprocess.run(["pdftotext", str(compiled), "-"], capture_output=True, text=True).stdout


@NEEDS_TEX
def test_special_characters_in_names_compile(wage_panel, tmp_path: Path) -> None:
    raw = wage_grid(tmp_path, wage_panel)
    raw["absorb"] = {"R&D_100% #1": ["nr"], "year & worker": ["nr", "year"]}
    raw["clustering"] = {"by worker_id (100%)": {"kind": "clustered", "by": "nr"}}
    raw["samples"] = {"all_years & #s": {}}
    raw["control_sets"] = {"named": {"none": [], "exp^2 & hours_{w}": ["expersq", "hours"]}}
    raw["run_name"] = "odd_names"
    ledger = fit_in_process(raw, tmp_path)
    tex = build_appendix(tmp_path, ledger, raw)
    assert latex_escape("R&D_100% #1") in tex.read_text()
    pdf = compile_latex(tex, tmp_path / "appendix.pdf")
    text = subprocess.run(["pdftotext", str(pdf), "-"], capture_output=True, text=True).stdout
    assert "R&D_100% #1" in text or "R&D 100% #1" in text


@NEEDS_TEX
def test_appendix_pdf_is_byte_identical_for_identical_inputs(wage_ledger, wage_panel, tmp_path: Path) -> None:
    tex = build_appendix(tmp_path, wage_ledger, wage_grid(tmp_path, wage_panel))
    first = compile_latex(tex, tmp_path / "one.pdf").read_bytes()
    second = compile_latex(tex, tmp_path / "two.pdf").read_bytes()
    assert first == second
