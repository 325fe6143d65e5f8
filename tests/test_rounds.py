"""Referee rounds: comparing ledgers and archiving a round. Data: statsmodels' Grunfeld data."""

from __future__ import annotations

import stat
from datetime import date
from pathlib import Path

import pandas as pd
import pytest

from fegrid.cli import main
from fegrid.errors import FegridError
from fegrid.pipeline import fit_grid
from fegrid.provenance import build_manifest
from fegrid.rounds import archive_round, compare_ledgers, comparison_latex, load_ledger
from fegrid.store import write_json


def _run(folder: Path, config: str = "grid.yaml") -> Path:
    """Fit the grid in-process (the rules' functions) and write a manifest beside the ledger."""
    with pytest.MonkeyPatch.context() as mp:  # the tests' one way of changing folder
        mp.chdir(folder)
        plan, _ = fit_grid(config)
        outputs = {"ledger_csv": plan.paths.ledger_csv, "ledger_parquet": plan.paths.ledger_parquet}
        manifest = build_manifest(config=plan.grid.raw, data_path=plan.grid.data_path, n_specs=len(plan.specs),
                                  seeds={}, outputs=outputs, benchmarks=[], workflow_root=folder,
                                  run_folder=plan.paths.run)
        write_json(plan.paths.run / "manifest.json", manifest)
        return folder / plan.paths.run


def _freeze(run: Path, tmp: Path, name: str) -> Path:
    out = tmp / name
    out.mkdir()
    for f in ("ledger.csv", "manifest.json"):
        (out / f).write_bytes((run / f).read_bytes())
    return out


def test_a_ledger_compared_with_itself_has_nothing_changed(tiny_project: Path) -> None:
    run = _run(tiny_project)
    old, man, _ = load_ledger(run)
    cmp = compare_ledgers(old, old.copy(), old_manifest=man, new_manifest=man)
    assert cmp.counts() == {"added": 0, "removed": 0, "unchanged": len(old), "changed": 0}
    assert cmp.data_changed is False
    assert r"\toprule" in comparison_latex(cmp)


def test_an_added_clustering_choice_gives_only_additions(tiny_project: Path, tmp_path: Path) -> None:
    before = _freeze(_run(tiny_project), tmp_path, "round1")
    text = (tiny_project / "grid.yaml").read_text().replace(
        "  firm: {kind: clustered, by: firm}",
        "  firm: {kind: clustered, by: firm}\n  year: {kind: clustered, by: year}")
    (tiny_project / "grid.yaml").write_text(text)
    after = _run(tiny_project)
    old, om, _ = load_ledger(before)
    new, nm, _ = load_ledger(after)
    cmp = compare_ledgers(old, new, old_manifest=om, new_manifest=nm)
    assert cmp.counts() == {"added": 16, "removed": 0, "unchanged": len(old), "changed": 0}
    assert set(cmp.added["clustering"]) == {"year"}


def test_perturbed_data_reports_the_changed_specifications(tiny_project: Path, tmp_path: Path, capsys) -> None:
    before = _freeze(_run(tiny_project), tmp_path, "round1")
    data = pd.read_csv(tiny_project / "grunfeld.csv")
    data.loc[(data["firm"] == "IBM") & (data["year"] == 1950), "invest"] *= 1.5
    data.to_csv(tiny_project / "grunfeld.csv", index=False)
    after = _run(tiny_project)
    old, om, _ = load_ledger(before)
    new, nm, _ = load_ledger(after)
    cmp = compare_ledgers(old, new, old_manifest=om, new_manifest=nm)
    assert cmp.data_changed is True and any("data file changed" in n for n in cmp.notes)
    assert cmp.counts()["added"] == 0 and cmp.counts()["removed"] == 0
    # every fit using IBM's 1950 row moves; the post-war sample holds it too
    assert cmp.counts()["changed"] == len(old)
    assert (cmp.changed["what_changed"].str.contains("estimate")).all()
    assert main(["compare", str(before), str(after), "--out", str(tmp_path / "letter")]) == 0
    assert "changed" in capsys.readouterr().out
    assert (tmp_path / "letter" / "comparison.tex").read_text().startswith(r"\begin{tabular}")
    assert (tmp_path / "letter" / "comparison.pdf").stat().st_size > 0
    # the round-comparison figure: every matched specification is one point, off the diagonal here
    from fegrid.figures import draw_comparison

    fig = draw_comparison(old, new, level=0.95)
    points = sum(len(c.get_offsets()) for ax in fig.axes for c in ax.collections)
    assert points == int((old["status"] == "ok").sum())
    legend = " ".join(t.get_text() for ax in fig.axes if ax.get_legend() for t in ax.get_legend().get_texts())
    assert "moved" in legend and "unchanged" not in legend


def test_archive_freezes_a_read_only_round(tiny_project: Path) -> None:
    run = _run(tiny_project)
    target = archive_round(run, label="submitted", today=date(2026, 12, 1))
    assert target.name == "2026-12-01-submitted"
    assert (target / "ledger.csv").read_bytes() == (run / "ledger.csv").read_bytes()
    assert not (target / "cache").exists()
    assert not (target / "ledger.csv").stat().st_mode & (stat.S_IWUSR | stat.S_IWGRP | stat.S_IWOTH)
    assert (target / "round.json").is_file()
    with pytest.raises(FegridError, match="never overwritten"):
        archive_round(run, label="submitted", today=date(2026, 12, 1))


def test_compare_reports_each_curve_on_its_own(tiny_project: Path) -> None:
    """Two focal regressors' estimates are on different scales: never pooled into one median."""
    run = _run(tiny_project)
    led, man, _ = load_ledger(run)
    cmp = compare_ledgers(led, led.copy(), old_manifest=man, new_manifest=man)
    assert sorted(map(tuple, cmp.curve[["outcome", "focal"]].drop_duplicates().to_numpy())) == [
        ("invest", "capital"), ("invest", "value")]
    for focal in ("value", "capital"):
        ok = led[(led["focal"] == focal) & (led["status"] == "ok")]
        row = cmp.curve[(cmp.curve["focal"] == focal) & (cmp.curve["ledger"] == "new")].iloc[0]
        assert row["median"] == pytest.approx(ok["estimate"].median())
    assert "invest on capital: median estimate" in comparison_latex(cmp)


def test_a_round_holds_exactly_the_declared_outputs(tiny_project: Path) -> None:
    run = _run(tiny_project)
    stale = run / "figures" / "curve-invest--gone.png"
    stale.parent.mkdir(parents=True, exist_ok=True)
    stale.write_bytes(b"a figure of an outcome that left the grid")
    target = archive_round(run, label="r1", today=date(2026, 12, 2))
    files = sorted(p.relative_to(target).as_posix() for p in target.rglob("*") if p.is_file())
    assert files == ["README.md", "ledger.csv", "ledger.parquet", "manifest.json", "round.json"]
    # an output changed after the run that listed it is refused, not frozen
    (run / "ledger.csv").write_text("edited by hand\n")
    with pytest.raises(FegridError, match="missing or changed"):
        archive_round(run, label="r2", today=date(2026, 12, 2))
