"""fegrid run's progress lines, read from the run folder (files written by hand here, with a
controlled clock), and the cost estimate of `fegrid plan` on statsmodels' Grunfeld data."""

from __future__ import annotations

import io
import os
from pathlib import Path

from fegrid.progress import RunMonitor, Stage, duration


def _touch(path: Path, when: float) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("x")
    os.utime(path, (when, when))


def test_each_stage_reports_counts_time_left_and_the_ledger_at_once(tmp_path: Path) -> None:
    now = [1000.0]
    fits = [tmp_path / f"fits/{i}.parquet" for i in range(4)]
    _touch(fits[0], 500.0)  # fitted by an earlier run: not this run's work
    ledger = tmp_path / "ledger.csv"
    _touch(ledger, 500.0)   # the previous run's ledger, to be rewritten
    draws = [tmp_path / f"joint/{i}.parquet" for i in range(5)]
    out = io.StringIO()
    monitor = RunMonitor([Stage("fits", fits, "specifications", [10, 20, 30, 40], fresh_only=True),
                          Stage("ledger", [ledger], "specifications", [100], done_note="written: ledger.csv"),
                          Stage("bootstrap draws", draws, "draws", [50] * 5, fresh_only=True)],
                         out=out, clock=lambda: now[0])
    monitor.update()
    assert out.getvalue() == ""  # nothing written yet; the old ledger does not count
    now[0] = 1010.0
    _touch(fits[1], 1009.0)
    monitor.update()
    assert "fits: 20 of 90 specifications, about 20 s left" in out.getvalue()  # 10 s per job, 2 jobs left
    now[0] = 1030.0
    _touch(fits[2], 1020.0)
    _touch(fits[3], 1029.0)
    _touch(ledger, 1030.0)
    monitor.update()
    lines = out.getvalue().splitlines()
    assert lines[-2] == "fegrid: fits: done (90 specifications)"
    assert lines[-1] == "fegrid: ledger: done (100 specifications); written: ledger.csv"
    now[0] = 1050.0
    _touch(draws[0], 1049.0)
    monitor.update()
    assert out.getvalue().splitlines()[-1] == "fegrid: bootstrap draws: 50 of 250 draws, about 3 min 20 s left"
    # a log gets a new line per stage at most every LOG_EVERY seconds
    now[0] = 1051.0
    _touch(draws[1], 1051.0)
    monitor.update()
    assert out.getvalue().splitlines()[-1].startswith("fegrid: bootstrap draws: 50 of")
    # the pace is the stage's own (2 s a chunk here), not diluted by the fits before it
    now[0] = 1062.0
    _touch(draws[2], 1053.0)
    monitor.update()
    assert out.getvalue().splitlines()[-1] == "fegrid: bootstrap draws: 150 of 250 draws, about 4 s left"


def test_durations_read_plainly() -> None:
    assert [duration(s) for s in (4, 200, 7400)] == ["4 s", "3 min 20 s", "2 h 03 min"]


def test_the_estimate_points_to_linearized_draws_only_when_refits_dominate() -> None:
    from fegrid.progress import Costs

    heavy = Costs(probe_specs=10, probe_seconds=1.0, fit_cpu_seconds=20.0, draws_cpu_seconds=900.0, cores=2,
                  refitted_draws=True)
    assert "joint_inference.method: linearized" in heavy.text()
    for light in (Costs(10, 1.0, 20.0, 100.0, 2, refitted_draws=True),  # under two minutes of draws
                  Costs(10, 1.0, 200.0, 900.0, 2, refitted_draws=True),  # under ten times the fits
                  Costs(10, 1.0, 20.0, 900.0, 2, refitted_draws=False)):  # already linearized
        assert "linearized" not in light.text()


def test_plan_prints_an_estimate_and_warns_above_the_size_set(tiny_project: Path, monkeypatch, capsys) -> None:
    from fegrid.cli import main

    monkeypatch.chdir(tiny_project)
    assert main(["plan", "--config", "grid.yaml"]) == 0
    out = capsys.readouterr()
    assert "estimated cost: fits ~" in out.out and "bootstrap draws ~" in out.out and "warning" not in out.err
    text = (tiny_project / "grid.yaml").read_text().replace("jobs: {specs_per_job: 4}",
                                                          "jobs: {specs_per_job: 4, warn_above: 10}")
    (tiny_project / "grid.yaml").write_text(text)
    assert main(["plan", "--config", "grid.yaml"]) == 0
    err = capsys.readouterr().err
    assert "warning: 32 specifications, more than jobs.warn_above (10)" in err and "caution" not in err
    # two-way clustering's year side keeps a drawn firm's copies in one cluster: plan and check say so
    text = text.replace("  firm: {kind: clustered, by: firm}",
                        "  firm: {kind: clustered, by: firm}\n  firm_year: {kind: two_way_clustered, by: [firm, year]}")
    (tiny_project / "grid.yaml").write_text(text)
    for command in ("plan", "check"):
        assert main([command, "--config", "grid.yaml"]) == 0
        assert "these clustering choices keep the copies of a drawn 'firm' in one cluster: firm_year (by year)" in (
            capsys.readouterr().err), command


def test_the_estimate_times_a_draw_after_what_a_process_pays_once(tiny_project: Path, monkeypatch) -> None:
    """``fegrid plan`` scales a few draws' CPU time up to the grid. A first call that pays one-time costs
    (imports, caches) made the one-draw probe dearer than the longer one, which read as no cost per draw:
    the demo's draws were estimated at 25 s of CPU for 79 s. With a stand-in for the draws that burns 0.3 s
    on its first call and 0.02 s per draw, the estimate holds 0.02 s per draw (common practice: a warm-up
    call before timing)."""
    import time

    import fegrid.joint
    from fegrid.pipeline import load_checked, make_plan
    from fegrid.progress import estimate_costs

    calls: list[int] = []

    def burn(seconds: float) -> None:
        end = time.process_time() + seconds
        while time.process_time() < end:
            pass

    def stand_in(grid, frame, specs, draws, **_) -> None:
        burn((0.3 if not calls else 0.0) + 0.02 * len(draws))
        calls.append(len(draws))

    monkeypatch.chdir(tiny_project)
    monkeypatch.setattr(fegrid.joint, "draw_curves", stand_in)
    plan = make_plan("grid.yaml")
    costs = estimate_costs(plan, load_checked(plan.grid), cores=2)
    assert calls and calls[0] == 1
    # one estimation method: its few blocks' time is scaled by the grid's specifications over theirs
    expected = 0.02 * plan.grid.draws * len(plan.specs) / costs.probe_specs
    assert abs(costs.draws_cpu_seconds - expected) < 0.25 * expected, (costs, expected)


def test_the_fegrid_command_runs_with_one_linear_algebra_thread() -> None:
    """The ``fegrid`` entry point (pyproject's script) sets one thread for the linear-algebra libraries before
    numpy loads, as every job does (a pool spinning beside ``fegrid plan``'s timed draws counted two to
    three times their CPU time); a value the user set stays."""
    import subprocess
    import sys
    import tomllib

    root = Path(__file__).resolve().parents[1]
    assert tomllib.loads((root / "pyproject.toml").read_text())["project"]["scripts"]["fegrid"] == "fegrid.command:main"
    code = ("import os, sys\n"
            "os.environ.pop('OPENBLAS_NUM_THREADS', None)\n"
            "os.environ['MKL_NUM_THREADS'] = '3'\n"
            "import fegrid.command as command\n"
            "assert 'numpy' not in sys.modules\n"
            "sys.argv = ['fegrid', '--version']\n"
            "try:\n    command.main()\nexcept SystemExit:\n    pass\n"
            "print(os.environ['OPENBLAS_NUM_THREADS'], os.environ['MKL_NUM_THREADS'], 'numpy' in sys.modules)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.split()[-3:] == ["1", "3", "True"]


def _draws_watched(tmp_path: Path, now: list[float]) -> tuple[list[Path], list[Path], io.StringIO, RunMonitor]:
    """Five chunks of draws, their jobs' logs, and a monitor on a clock the test moves."""
    draws = [tmp_path / f"joint/{i}.parquet" for i in range(5)]
    logs = [tmp_path / f"logs/draw-{i}.log" for i in range(5)]
    out = io.StringIO()
    monitor = RunMonitor([Stage("bootstrap draws", draws, "draws", [50] * 5, fresh_only=True, logs=logs)],
                         out=out, clock=lambda: now[0])
    return draws, logs, out, monitor


def test_the_first_chunk_of_draws_is_paced_from_the_first_draw_job_start(tmp_path: Path) -> None:
    """The draws wait for the ledger, summary and figures: with one chunk done, its pace counts from
    when the monitor saw the first draw job's log appear, not from the run's start (before, the
    first line said about 3 min 20 s left here, for 40 s of work)."""
    now = [1000.0]
    draws, logs, out, monitor = _draws_watched(tmp_path, now)
    now[0] = 1040.0
    monitor.update()  # the report stages run: no draw job has started
    now[0] = 1041.0
    _touch(logs[0], 1040.5)
    monitor.update()
    now[0] = 1051.0
    _touch(draws[0], 1050.5)
    monitor.update()
    assert out.getvalue().splitlines()[-1] == "fegrid: bootstrap draws: 50 of 250 draws, about 40 s left"


def _two_draw_jobs_started(tmp_path: Path, now: list[float]) -> tuple[list[Path], io.StringIO, RunMonitor]:
    """Two draw jobs whose logs appeared at 1040.5, seen by the monitor at 1041."""
    draws, logs, out, monitor = _draws_watched(tmp_path, now)
    now[0] = 1041.0
    _touch(logs[0], 1040.5)
    _touch(logs[1], 1040.5)
    monitor.update()
    return draws, out, monitor


def test_draw_jobs_side_by_side_share_the_pace(tmp_path: Path) -> None:
    """Two draw jobs start together; when the first ends (10 s), with two running side by side, the
    four chunks left take about 20 s, not 40 s (the demo's first line read 8 min 51 s for about 4 min)."""
    now = [1000.0]
    draws, out, monitor = _two_draw_jobs_started(tmp_path, now)
    now[0] = 1051.0
    _touch(draws[0], 1050.5)  # the next job has not started yet: one is running, but two ran side by side
    monitor.update()
    assert out.getvalue().splitlines()[-1] == "fegrid: bootstrap draws: 50 of 250 draws, about 20 s left"


def test_draw_jobs_that_end_together_do_not_read_no_time_left(tmp_path: Path) -> None:
    """Two draw jobs start together and end a tenth of a second apart (10 s each): three chunks are
    left, about 15 s at the pace of two jobs per 10 s (the demo once read "100 of 500 draws, about
    0 s left", from the tenth of a second between the two files)."""
    now = [1000.0]
    draws, out, monitor = _two_draw_jobs_started(tmp_path, now)
    now[0] = 1051.0
    _touch(draws[0], 1050.5)
    _touch(draws[1], 1050.6)
    monitor.update()
    assert out.getvalue().splitlines()[-1] == "fegrid: bootstrap draws: 100 of 250 draws, about 15 s left"


def test_a_report_stage_with_few_files_gives_no_time_left(tmp_path: Path) -> None:
    """The appendix's .tex, then its .pdf: one file written says nothing about the time left."""
    now = [100.0]
    tex, pdf = tmp_path / "appendix.tex", tmp_path / "appendix.pdf"
    out = io.StringIO()
    monitor = RunMonitor([Stage("appendix", [tex, pdf], "files", [1, 1])], out=out, clock=lambda: now[0])
    now[0] = 300.0
    _touch(tex, 299.0)
    monitor.update()
    assert out.getvalue().splitlines()[-1] == "fegrid: appendix: 1 of 2 files"


def test_the_terminal_summary_prints_blanks_not_nan(tiny_project: Path, monkeypatch, capsys) -> None:
    """statsmodels' Grunfeld: `capital` has no baseline in the tiny grid, so its baseline is blank; a ledger
    that is not the config's grid (the config changed since the run) is named an earlier run's."""
    import fegrid
    from fegrid.cli import main

    monkeypatch.chdir(tiny_project)
    fegrid.fit_grid("grid.yaml", cache="reports", progress=False)
    assert main(["summary", "--config", "grid.yaml"]) == 0
    shown = capsys.readouterr()
    assert "capital" in shown.out and "nan" not in shown.out and "note:" not in shown.err
    # the config changed since: the summary says the ledger is an earlier run's
    firm = "  firm: {kind: clustered, by: firm}"
    text = (tiny_project / "grid.yaml").read_text()
    (tiny_project / "grid.yaml").write_text(text.replace(firm, firm + "\n  year: {kind: clustered, by: year}")
                                            .replace("  postwar: {range: {year: {min: 1946}}}\n", ""))
    assert main(["summary", "--config", "grid.yaml"]) == 0
    assert ("note: this ledger lacks 8 specification(s) the config declares and holds 16 the config no longer "
            "declares: it is an earlier run's; 'fegrid run --config grid.yaml' brings it up to date.") in " ".join(
        capsys.readouterr().err.split())


def test_lines_stop_quietly_when_their_reader_goes_away(tmp_path: Path) -> None:
    """A closed pipe (`fegrid run | head`): the first failed write ends the lines without an error, and no
    later line is attempted; the run they describe is not the monitor's to stop."""

    class ClosedPipe(io.StringIO):
        writes = 0

        def write(self, text: str) -> int:
            ClosedPipe.writes += 1
            raise BrokenPipeError(32, "Broken pipe")

    now = [1000.0]
    fits = [tmp_path / f"fits/{i}.parquet" for i in range(2)]
    ledger = tmp_path / "ledger.csv"
    monitor = RunMonitor([Stage("fits", fits, "specifications", [10, 20], fresh_only=True),
                          Stage("ledger", [ledger], "specifications", [30])], out=ClosedPipe(),
                         clock=lambda: now[0])
    _touch(fits[0], 1001.0)
    now[0] = 1002.0
    monitor.update()  # the first line: its write fails
    _touch(fits[1], 1003.0)
    _touch(ledger, 1003.0)
    now[0] = 1004.0
    monitor.update()
    with monitor:
        pass
    assert ClosedPipe.writes == 1
