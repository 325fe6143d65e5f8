"""Bad input: one clear paragraph naming the key, column or specification; exit code 2; earlier
results untouched. Data: statsmodels' Grunfeld investment data (see conftest.py)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from fegrid.cli import main
from fegrid.pipeline import fit_grid


@pytest.fixture()
def fitted(tiny_project: Path, monkeypatch) -> Path:
    """The tiny grid fitted in-process (same functions as the Snakemake rules call)."""
    monkeypatch.chdir(tiny_project)
    fit_grid("grid.yaml")
    return tiny_project


def _edit(text: str, old: str, new: str) -> str:
    assert old in text, old
    return text.replace(old, new)


CONFIG_CASES = {
    "broken YAML": (("outcomes: [invest]", "outcomes: [invest"), r"not valid YAML at line \d+"),
    "unknown key": (("outcomes:", "colour: red\noutcomes:"), r"Unknown key\(s\) 'colour' under '\(top level\)'"),
    "wrong type": (("jobs: {specs_per_job: 4}", "jobs: {specs_per_job: four}"), r"'jobs.specs_per_job' is invalid"),
    "unknown control column": (("combinations_of: [capital, value]", "combinations_of: [capital, rain]"),
                               r"control column\(s\) 'rain'"),
    "unknown cluster column": (("by: firm}", "by: industry}"), r"cluster column\(s\) 'industry'"),
    "unknown outcome column": (("outcomes: [invest]", "outcomes: [investment]"), r"outcome column\(s\) 'investment'"),
    # the misspelt column is named, not the exhibit or table it also breaks
    "unknown outcome column with exhibits": (
        ("outcomes: [invest]", "outcomes: [investment]\nreplication: {exhibits: {figure_invest_value_pdf: Figure 1}}"),
        r"outcome column\(s\) 'investment'"),
    "empty sample": (("min: 1946", "min: 2046"), r"Sample 'postwar' keeps no rows"),
    "exclusion names no choice": (("jobs:", "exclude: [{absorb: firm_month}]\njobs:"),
                                  r"exclude\[0\] names absorb choice\(s\) \['firm_month'\]"),
    "same name twice": (("  robust: {kind: hc1}", "  robust: {kind: hc1}\n  robust: {kind: homoskedastic}"),
                        r"name 'robust' is given twice"),
    "data file missing": (("path: grunfeld.csv", "path: nowhere.csv"), r"'nowhere.csv'.*does not exist"),
    "baseline names no choice": (("sample: all,", "sample: everything,"), r"baseline.sample is 'everything'"),
    "bootstrap on robust errors": (("robust: {kind: hc1}", "robust: {kind: hc1, wild_bootstrap: {draws: 99}}"),
                                   r"clustering.robust: the wild cluster bootstrap needs kind 'clustered'"),
    "unknown instrument column": (("jobs:", "estimators: {iv: {method: two_stage_least_squares, instruments: "
                                            "[rain]}}\njobs:"), r"instrument column\(s\) 'rain'"),
    "unknown estimator method": (("jobs:", "estimators: {iv: {method: gmm}}\njobs:"),
                                 r"'estimators.iv.method' is invalid"),
    "combination of a column never kept": (("jobs:", "combinations: {c: {total: {value: 1}}}\njobs:"),
                                           r"'combinations.c' is invalid"),
    "unknown bootstrap weights": (("firm: {kind: clustered, by: firm}",
                                   "firm: {kind: clustered, by: firm, wild_bootstrap: {weights: mammen}}"),
                                  r"'clustering.firm.wild_bootstrap.weights' is invalid"),
}


@pytest.mark.parametrize("case", sorted(CONFIG_CASES))
def test_bad_config_gives_one_paragraph_and_leaves_results(case: str, fitted: Path, capsys) -> None:
    (old, new), pattern = CONFIG_CASES[case]
    ledger = (fitted / "reports/tiny/ledger.csv").read_bytes()
    bad = fitted / "bad.yaml"
    bad.write_text(_edit((fitted / "grid.yaml").read_text(), old, new))
    for command in ("check", "run"):
        assert main([command, "--config", str(bad)]) == 2
        err = capsys.readouterr().err
        assert err.startswith("fegrid: error: ")
        assert "Traceback" not in err and err.count("\n") == 1  # one paragraph
        assert pd.Series([err]).str.contains(pattern, regex=True).iloc[0], err
    assert (fitted / "reports/tiny/ledger.csv").read_bytes() == ledger


DATA_CASES = {
    "duplicate panel keys": (lambda d: pd.concat([d, d.iloc[[3]]]),
                             r"panel keys \(firm, year\) are not unique.*firm=General Motors, year=1938"),
    "non-numeric regressor": (lambda d: d.assign(value=d["value"].astype(str) + " USD"),
                              r"focal regressor column 'value' is not numeric"),
    "cluster variable with missing values": (lambda d: d.assign(firm=d["firm"].where(d.index != 5)),
                                             r"column 'firm' has 1 missing value"),
    "infinite outcome": (lambda d: d.assign(invest=d["invest"].where(d.index != 4, float("inf"))),
                         r"outcome column 'invest' has 1 infinite value\(s\).*line\(s\) 6 "),
    "minus infinity in a regressor": (lambda d: d.assign(capital=d["capital"].where(d.index > 1, float("-inf"))),
                                      r"column 'capital' has 2 infinite value\(s\)"),
    "header only": (lambda d: d.iloc[0:0], r"has a header but no rows of data"),
}


@pytest.mark.parametrize("case", sorted(DATA_CASES))
def test_bad_data_gives_one_paragraph_and_leaves_results(case: str, fitted: Path, capsys) -> None:
    change, pattern = DATA_CASES[case]
    ledger = (fitted / "reports/tiny/ledger.csv").read_bytes()
    data = pd.read_csv(fitted / "grunfeld.csv")
    change(data).to_csv(fitted / "grunfeld.csv", index=False)
    assert main(["run", "--config", "grid.yaml"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and pd.Series([err]).str.contains(pattern, regex=True).iloc[0], err
    assert (fitted / "reports/tiny/ledger.csv").read_bytes() == ledger


@pytest.mark.parametrize("argv", [["run", "grid.yaml"], ["run", "grid.yaml", "-c", "2", "--verbose"],
                                  ["run", "--config", "grid.yaml", "all"], ["demo", "all"]])
def test_arguments_without_the_separator_are_refused_before_anything_runs(argv: list[str], fitted: Path, capsys,
                                                                          monkeypatch) -> None:
    """A config file named without --config (and every option after it) would have gone to Snakemake, which
    failed silently under fegrid's progress lines: it is refused with one paragraph naming --config and '--',
    exit 2, and the earlier results are untouched. Arguments after '--' still reach Snakemake."""
    from fegrid import cli

    ledger = (fitted / "reports/tiny/ledger.csv").read_bytes()
    assert main(argv) == 2
    err = capsys.readouterr().err
    word = argv[3] if argv[1] == "--config" else argv[1]
    assert "Traceback" not in err and f"'{word}' is not an argument of 'fegrid {argv[0]}'" in err
    assert "after '--'" in err and ("--config grid.yaml" in err) == (word == "grid.yaml")
    assert (fitted / "reports/tiny/ledger.csv").read_bytes() == ledger
    seen = []
    monkeypatch.setitem(cli.COMMANDS, "run", lambda args: seen.append(args.snakemake_args) or 0)
    assert main(["run", "--config", "grid.yaml", "--", "--dry-run"]) == 0 and seen == [["--dry-run"]]


def test_unparseable_data_file(fitted: Path, capsys) -> None:
    (fitted / "grunfeld.parquet").write_bytes(b"this is not parquet")
    bad = fitted / "bad.yaml"
    bad.write_text(_edit((fitted / "grid.yaml").read_text(), "grunfeld.csv", "grunfeld.parquet"))
    assert main(["check", "--config", str(bad)]) == 2
    assert "cannot be read as Parquet" in capsys.readouterr().err


def test_absorbed_focal_is_a_ledger_row_not_an_error(fitted: Path) -> None:
    """A firm-invariant regressor under firm effects: status not_identified, with the reason."""
    data = pd.read_csv(fitted / "grunfeld.csv")
    data["founded"] = data.groupby("firm")["year"].transform("min") - data["firm"].str.len()
    data.to_csv(fitted / "grunfeld.csv", index=False)
    text = _edit((fitted / "grid.yaml").read_text(), "[value, capital]", "[value, capital, founded]")
    (fitted / "grid.yaml").write_text(text)
    ledger = fit_grid("grid.yaml")[1]
    founded = ledger[ledger["focal"] == "founded"]
    assert len(founded) > 0 and (founded["status"] == "not_identified").all()
    assert founded["message"].str.contains("absorbed by the fixed effects").all()
    assert founded["estimate"].isna().all()


def test_cli_exit_code_in_a_real_process(tiny_project: Path, fegrid_env) -> None:
    (tiny_project / "grid.yaml").write_text("run_name: [unclosed\n")
    proc = subprocess.run([sys.executable, "-m", "fegrid.cli", "check", "--config", "grid.yaml"],
                          cwd=tiny_project, capture_output=True, text=True, env=fegrid_env)
    assert proc.returncode == 2
    assert proc.stderr.startswith("fegrid: error: The config file 'grid.yaml' is not valid YAML")


def test_data_path_that_is_a_folder_or_semicolon_separated(fitted: Path, capsys) -> None:
    bad = fitted / "bad.yaml"
    (fitted / "folder.csv").mkdir()
    bad.write_text(_edit((fitted / "grid.yaml").read_text(), "grunfeld.csv", "folder.csv"))
    assert main(["check", "--config", str(bad)]) == 2
    assert "is a folder" in capsys.readouterr().err
    pd.read_csv(fitted / "grunfeld.csv").to_csv(fitted / "semi.csv", sep=";", index=False)
    bad.write_text(_edit((fitted / "grid.yaml").read_text(), "grunfeld.csv", "semi.csv"))
    assert main(["check", "--config", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "separated by semicolons" in err and err.count("\n") == 1
    # declared, the same file reads
    declared = "path: semi.csv, csv: {separator: ';'}"
    bad.write_text(_edit((fitted / "grid.yaml").read_text(), "path: grunfeld.csv", declared))
    assert main(["check", "--config", str(bad)]) == 0, capsys.readouterr().err


def test_demo_refuses_a_config_instead_of_ignoring_it(capsys) -> None:
    assert main(["demo", "--config", "mine.yaml"]) == 2
    assert "fegrid run --config mine.yaml" in capsys.readouterr().err


def test_check_lists_the_combinations_it_leaves_out(tiny_project: Path, monkeypatch, capsys) -> None:
    monkeypatch.chdir(tiny_project)
    assert main(["check", "--config", "grid.yaml"]) == 0
    out = capsys.readouterr().out
    assert "left out of the grid (4)" in out
    assert "control set 'capital' holds 'capital' (outcome invest, focal capital)" in out
    assert "1 jobs" not in out


def test_output_cut_short_by_a_pipe_is_not_an_error(tiny_project: Path, fegrid_env) -> None:
    """`fegrid check | head -1`: the reader leaves early; no BrokenPipe traceback."""
    proc = subprocess.run(f"'{sys.executable}' -m fegrid.cli check --config grid.yaml | head -c 10",
                          shell=True, cwd=tiny_project, capture_output=True, text=True, env=fegrid_env)
    assert "Traceback" not in proc.stderr and "BrokenPipe" not in proc.stderr, proc.stderr


def test_a_failure_while_snakemake_starts_stops_it_and_keeps_the_results(fitted: Path, monkeypatch) -> None:
    """`fegrid run` counts what is left to fit while Snakemake starts; should that side fail, Snakemake is
    stopped before the error shows, and the earlier results are left as they were (and marked as put back,
    so that the next run rebuilds the reports whatever Snakemake's records say)."""
    import subprocess

    import fegrid.cli

    run = fitted / "reports/tiny"
    before = {p.relative_to(run): p.read_bytes() for p in run.rglob("*") if p.is_file()
              and p.relative_to(run).parts[0] not in {"cache", "logs", "benchmarks", ".lock", ".previous"}}
    started: list[subprocess.Popen] = []

    class Recorded(subprocess.Popen):
        def __init__(self, *args, **kwargs) -> None:
            super().__init__(*args, **kwargs)
            started.append(self)

    def broken(*args, **kwargs):
        raise RuntimeError("counting failed")

    monkeypatch.setattr(fegrid.cli.subprocess, "Popen", Recorded)
    monkeypatch.setattr(fegrid.cli, "plan_status", broken)
    with pytest.raises(RuntimeError, match="counting failed"):
        main(["run", "--config", "grid.yaml"])
    assert len(started) == 1 and started[0].poll() is not None  # Snakemake was started, and is gone
    after = {p.relative_to(run): p.read_bytes() for p in run.rglob("*") if p.is_file()
             and p.relative_to(run).parts[0] not in {"cache", "logs", "benchmarks", ".lock", ".previous"}}
    assert after == before and (run / "cache/put-back").is_file()
