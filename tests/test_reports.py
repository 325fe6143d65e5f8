"""Reports: the curve figure, summaries, joint inference, the LaTeX appendix, provenance.

Data: linearmodels' wage_panel (an open dataset) for grids of real fits; invented data only in the
Monte Carlo checks of the joint tests.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from fegrid.figures import draw_curve, pair_slug, save_curve
from fegrid.grid import load_config, spec_table
from fegrid.joint import draw_curves, joint_tests, resample_panel
from fegrid.ledger import LEDGER_COLUMNS
from fegrid.pipeline import fit_grid
from fegrid.report import compile_latex, figure_names, latex_escape, render_appendix, write_summaries
from fegrid.summary import curve_summary

NEEDS_TEX = pytest.mark.skipif(
    shutil.which("pdflatex") is None and os.environ.get("CI") != "true",
    reason="pdflatex is not installed (CI installs it and runs these tests)",
)


def _wage_grid(tmp: Path, wage_panel: pd.DataFrame, **extra) -> dict:
    wage_panel.to_csv(tmp / "wage.csv", index=False)
    raw = {
        "run_name": "wage",
        "data": {"path": str(tmp / "wage.csv"), "unit": "nr", "time": "year"},
        "outcomes": ["lwage"],
        "focal_regressors": ["union", "married"],
        "absorb": {"worker": ["nr"], "worker_year": ["nr", "year"], "pooled": [],
                   "worker_occupation": ["nr", "year", "occupation"]},
        "clustering": {"robust": {"kind": "robust"}, "worker": {"kind": "cluster", "by": "nr"},
                       "iid": {"kind": "iid"}, "two_way": {"kind": "twoway", "by": ["nr", "year"]}},
        "samples": {"all": {}, "after_1981": {"range": {"year": {"min": 1982}}},
                    "not_1987": {"drop": {"year": [1987]}}, "balanced": {"balanced": True}},
        "control_sets": {"combinations_of": ["expersq", "hours", "black", "union", "married"]},
        "joint_inference": {"draws": 0},
    }
    raw.update(extra)
    return raw


def _fit_in_process(raw: dict, folder: Path) -> pd.DataFrame:
    """The grid fitted with the same functions the Snakemake rules call."""
    cwd = os.getcwd()
    os.chdir(folder)
    try:
        return fit_grid(raw)[1]
    finally:
        os.chdir(cwd)


@pytest.fixture(scope="module")
def wage_ledger(tmp_path_factory, wage_panel) -> pd.DataFrame:
    folder = tmp_path_factory.mktemp("wage")
    return _fit_in_process(_wage_grid(folder, wage_panel), folder)


# ---- figure ---------------------------------------------------------------------------------------

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


# ---- summary --------------------------------------------------------------------------------------

def test_summary_counts_and_baseline_percentile(wage_ledger: pd.DataFrame, tmp_path: Path) -> None:
    summ = curve_summary(wage_ledger, 0.95)
    union = summ[summ["focal"] == "union"].iloc[0]
    part = wage_ledger[wage_ledger["focal"] == "union"]
    ok = part[part["status"] == "ok"]
    assert union["specs"] == len(part) and union["fitted"] == len(ok)
    assert union["median"] == pytest.approx(ok["estimate"].median())
    # the baseline's percentile, checked on the curve that holds the baseline (whichever focal it has)
    base = wage_ledger[wage_ledger["is_baseline"]].iloc[0]
    curve = wage_ledger[(wage_ledger["focal"] == base["focal"]) & (wage_ledger["status"] == "ok")]["estimate"]
    row = summ[summ["focal"] == base["focal"]].iloc[0]
    below, ties = (curve < base["estimate"]).sum(), (curve == base["estimate"]).sum()
    assert ties >= 1
    assert row["baseline_percentile"] == pytest.approx(100 * (below + 0.5 * ties) / len(curve), abs=1e-9)
    assert row["baseline_estimate"] == base["estimate"]
    paths = write_summaries(wage_ledger, 0.95, tmp_path)
    assert pd.read_csv(paths["summary_csv"]).shape[0] == 2
    assert "| outcome" in paths["summary_md"].read_text()
    assert r"\toprule" in paths["summary_tex"].read_text()


# ---- joint inference -----------------------------------------------------------------------------

def _invented_panel(seed: int, effect: float, units: int = 30, periods: int = 5) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    unit = np.repeat(np.arange(units), periods)
    a = rng.normal(size=units)[unit]
    x = 0.7 * a + rng.normal(size=len(unit))
    return pd.DataFrame({"unit": unit, "time": np.tile(np.arange(periods), units), "x": x,
                         "c1": rng.normal(size=len(unit)), "c2": rng.normal(size=len(unit)),
                         "y": effect * x + a + rng.normal(size=len(unit))})


MC_GRID = {
    "run_name": "mc", "data": {"path": "unused.csv", "unit": "unit", "time": "time"},
    "outcomes": ["y"], "focal_regressors": ["x"],
    "absorb": {"unit": ["unit"], "unit_time": ["unit", "time"]},
    "clustering": {"robust": {"kind": "robust"}, "unit": {"kind": "cluster", "by": "unit"}},
    "control_sets": {"combinations_of": ["c1", "c2"]},
}


def _observed(grid, frame, specs) -> pd.DataFrame:
    from fegrid.estimate import fit_block

    rows = []
    by_block: dict[str, list] = {}
    for s in specs:
        by_block.setdefault(s.block_key, []).append(s)
    for block in by_block.values():
        fit = fit_block(frame, grid.block_settings(block[0]), [s.request() for s in block])
        rows.extend(r.record() for r in fit.results)
    table = spec_table(grid, specs)
    return table.merge(pd.DataFrame(rows), on="spec_id")


def _joint_p(seed: int, effect: float, draws: int) -> pd.Series:
    grid = load_config(MC_GRID)
    specs = grid.expand()
    frame = _invented_panel(seed, effect)
    ledger = _observed(grid, frame, specs)
    boot = draw_curves(grid, frame, specs, range(draws), seed=seed, column="unit")
    tests = joint_tests(ledger, boot, 0.95)
    return tests.set_index("statistic")["p_value"]


@pytest.mark.slow
def test_joint_tests_uniform_under_the_null_and_small_under_an_effect() -> None:
    """Monte Carlo on INVENTED panels (30 units x 5 periods, 16 specifications, 49 draws each).

    Under a true null the p-values of the two continuous statistics (median, Stouffer's Z) should be
    roughly uniform across 40 seeds: we accept a mean within 0.5 +/- 0.15. The share significant is
    discrete (often no specification is significant, and then p = 1), so its test is conservative:
    we accept a mean of at least 0.35. All three must hold their size: at most 20% of the seeds
    below 0.10 (about 3 binomial SEs above 10%). With a strong effect (0.5, t about 8) every p-value
    is below 0.05.
    """
    null = pd.DataFrame([_joint_p(seed, 0.0, 49) for seed in range(40)])
    for stat in ("median_estimate", "stouffer_z"):
        assert 0.35 <= null[stat].mean() <= 0.65, (stat, null[stat].mean())
    assert null["share_significant"].mean() >= 0.35
    for stat in ("median_estimate", "share_significant", "stouffer_z"):
        assert (null[stat] < 0.10).mean() <= 0.20, (stat, (null[stat] < 0.10).mean())
    strong = _joint_p(7, 0.5, 49)
    assert (strong < 0.05).all(), strong


def test_draws_do_not_depend_on_chunking_and_units_stay_separate() -> None:
    grid = load_config(MC_GRID)
    specs = grid.expand()
    frame = _invented_panel(3, 0.2)
    whole = draw_curves(grid, frame, specs, range(4), seed=11, column="unit")
    parts = pd.concat([draw_curves(grid, frame, specs, r, seed=11, column="unit")
                       for r in (range(0, 1), range(1, 4))], ignore_index=True)
    pd.testing.assert_frame_equal(whole, parts)
    boot = resample_panel(frame, "unit", "unit", np.random.default_rng([11, 0]))
    assert len(boot) == len(frame) and boot["unit"].nunique() == frame["unit"].nunique()
    assert not boot.duplicated(["unit", "time"]).any()  # a unit drawn twice is two units


# ---- LaTeX appendix -------------------------------------------------------------------------------

def _appendix(folder: Path, ledger: pd.DataFrame, raw: dict) -> Path:
    grid = load_config(raw)
    figures = figure_names(ledger)
    for rel, (outcome, focal) in zip(figures, sorted({tuple(x) for x in ledger[["outcome", "focal"]].to_numpy()})):
        part = ledger[(ledger["outcome"] == outcome) & (ledger["focal"] == focal)]
        save_curve(draw_curve(part), folder / rel.replace(".pdf", ".png"), folder / rel)
        assert rel.endswith(f"curve-{pair_slug(outcome, focal)}.pdf")
    joint = pd.DataFrame([{"outcome": "lwage", "focal": "union", "statistic": "median_estimate", "observed": 0.07,
                           "p_value": 0.0, "draws": 10, "specs": 5, "dominant_sign": "+"}])
    return render_appendix(grid, ledger, joint, figures, folder / "appendix.tex", draws=10, seed=1,
                           resample="nr")


@NEEDS_TEX
def test_appendix_compiles_alone_and_inside_a_paper(wage_ledger, wage_panel, tmp_path: Path) -> None:
    tex = _appendix(tmp_path, wage_ledger, _wage_grid(tmp_path, wage_panel))
    pdf = compile_latex(tex, tmp_path / "appendix.pdf")
    text = subprocess.run(["pdftotext", "-layout", str(pdf), "-"], capture_output=True, text=True).stdout
    base = wage_ledger[wage_ledger["is_baseline"]].iloc[0]
    assert f"{base['estimate']:.4f}" in text  # the baseline as printed in the ledger, to 4 decimals
    assert "Every specification" in text
    paper = tmp_path / "paper.tex"
    paper.write_text("\\documentclass{article}\\usepackage{booktabs,longtable,graphicx}\\begin{document}\n"
                     "Main text.\\newcommand{\\fegriddir}{./}\\input{appendix.tex}\n\\end{document}\n")
    compiled = compile_latex(paper, tmp_path / "paper.pdf")
    assert "Main text." in subprocess.run(["pdftotext", str(compiled), "-"], capture_output=True, text=True).stdout


@NEEDS_TEX
def test_special_characters_in_names_compile(wage_panel, tmp_path: Path) -> None:
    raw = _wage_grid(tmp_path, wage_panel)
    raw["absorb"] = {"R&D_100% #1": ["nr"], "year & worker": ["nr", "year"]}
    raw["clustering"] = {"by worker_id (100%)": {"kind": "cluster", "by": "nr"}}
    raw["samples"] = {"all_years & #s": {}}
    raw["control_sets"] = {"named": {"none": [], "exp^2 & hours_{w}": ["expersq", "hours"]}}
    raw["run_name"] = "odd_names"
    ledger = _fit_in_process(raw, tmp_path)
    tex = _appendix(tmp_path, ledger, raw)
    assert latex_escape("R&D_100% #1") in tex.read_text()
    pdf = compile_latex(tex, tmp_path / "appendix.pdf")
    text = subprocess.run(["pdftotext", str(pdf), "-"], capture_output=True, text=True).stdout
    assert "R&D_100% #1" in text or "R&D 100% #1" in text


def test_ledger_columns_documented_in_readme() -> None:
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    for col in LEDGER_COLUMNS:
        assert f"`{col}`" in readme, col


def test_manifest_and_replication(wage_ledger, tmp_path: Path, wage_panel) -> None:
    from fegrid.provenance import build_manifest, replication_section

    raw = _wage_grid(tmp_path, wage_panel)
    out = tmp_path / "ledger.csv"
    wage_ledger.to_csv(out, index=False)
    bench = tmp_path / "benchmarks" / "fit_job" / "abc.tsv"
    bench.parent.mkdir(parents=True)
    bench.write_text("s\th:m:s\tmax_rss\n1.5\t0:00:01\t120.0\n")
    man = build_manifest(config=raw, data_path=raw["data"]["path"], n_specs=len(wage_ledger),
                         seeds={"joint_inference.seed": 5}, outputs={"ledger_csv": out}, benchmarks=[bench],
                         workflow_root=tmp_path)
    import hashlib

    assert man["data"]["sha256"] == hashlib.sha256(Path(raw["data"]["path"]).read_bytes()).hexdigest()
    assert man["stages"]["fit_job"] == {"jobs": 1, "wall_seconds": 1.5, "max_rss_mb": 120.0}
    assert man["outputs"]["ledger_csv"]["sha256"] == hashlib.sha256(out.read_bytes()).hexdigest()
    assert set(man["packages"]) >= {"numpy", "pandas", "snakemake"}
    text = replication_section(man, config_path="grid.yaml", draws=500, seed=5)
    for heading in ("### Computational requirements", "#### Software requirements", "#### Controlled randomness",
                    "#### Memory and runtime requirements", "### List of outputs"):
        assert heading in text
    assert "`joint_inference.seed` (value 5)" in text
    json.dumps(man)


def test_choice_effects_are_measured_on_matched_specifications(wage_ledger: pd.DataFrame) -> None:
    """A clustering choice cannot move a point estimate (published identity: the covariance does
    not enter the coefficient). With exclusions that make the choices' sets of specifications
    differ, plain medians per choice differ anyway; matched shifts must be exactly zero."""
    from fegrid.summary import choice_medians

    # exclude iid errors from every pooled and every balanced-sample specification: the clustering
    # choices now cover different specifications
    led = wage_ledger[~((wage_ledger["clustering"] == "iid")
                        & wage_ledger["absorb"].isin(["pooled", "worker"]))].reset_index(drop=True)
    moves = choice_medians(led)
    clus = moves[(moves["focal"] == "union") & (moves["dimension"] == "clustering")].set_index("choice")
    assert clus.loc["iid", "median"] != pytest.approx(clus.loc["robust", "median"])  # composition differs
    assert (clus["matched_shift"].abs() < 1e-12).all() and (clus["dimension_effect"] < 1e-12).all()
    assert (clus.drop(index=clus["reference"].iloc[0])["matched_pairs"] > 0).all()
    absorb = moves[(moves["focal"] == "union") & (moves["dimension"] == "absorb")].set_index("choice")
    # the matched shift of a choice is the median of paired differences, checked by hand for one
    ok = led[(led["status"] == "ok") & (led["focal"] == "union")]
    others = [d for d in ("outcome", "focal", "clustering", "sample", "controls", "weights")]
    ref = absorb["reference"].iloc[0]
    pairs = ok[ok["absorb"] == "pooled"].merge(ok[ok["absorb"] == ref], on=others, suffixes=("", "_ref"))
    assert absorb.loc["pooled", "matched_pairs"] == len(pairs)
    assert absorb.loc["pooled", "matched_shift"] == pytest.approx((pairs["estimate"] - pairs["estimate_ref"]).median())


@NEEDS_TEX
def test_appendix_pdf_is_byte_identical_for_identical_inputs(wage_ledger, wage_panel, tmp_path: Path) -> None:
    tex = _appendix(tmp_path, wage_ledger, _wage_grid(tmp_path, wage_panel))
    first = compile_latex(tex, tmp_path / "one.pdf").read_bytes()
    second = compile_latex(tex, tmp_path / "two.pdf").read_bytes()
    assert first == second
