"""Real Snakemake runs of a small grid in a temporary folder (subprocesses, as a user runs them).

Data: statsmodels' Grunfeld investment data (see conftest.py). Checked: the ledger's columns and
content, a rerun that fits nothing (also after the data file is touched or rewritten with the same
bytes), an added clustering choice that only adds specifications and demeans nothing again, a run
killed with SIGKILL that resumes to a byte-identical ledger, parallel and serial runs giving the
same bytes, a run whose progress lines' reader goes away, failures on fegrid's side and on Snakemake's
(before any job) whose put-back results the next run redoes (also when an older version left them
unmarked), and ``snakemake --lint``.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from fegrid.absorb import parse_absorb
from fegrid.estimate import Inference, fit_one
from fegrid.ledger import LEDGER_COLUMNS
from fegrid.locations import workflow_root

pytestmark = pytest.mark.slow

SNAKEFILE = workflow_root() / "Snakefile"


def _snakemake(folder: Path, env: dict, *args: str) -> subprocess.CompletedProcess:
    cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(SNAKEFILE), "--directory", str(folder),
           "--configfile", str(folder / "grid.yaml"), "--cores", "2", *args]
    return subprocess.run(cmd, capture_output=True, text=True, env=env, cwd=folder, timeout=600)


def _fegrid(folder: Path, env: dict, *args: str, **kw) -> subprocess.CompletedProcess:
    cmd = [sys.executable, "-m", "fegrid.cli", *args]
    return subprocess.run(cmd, capture_output=True, text=True, env=env, cwd=folder, timeout=600, **kw)


def _fitted_jobs(result: subprocess.CompletedProcess, folder: Path | None = None) -> int:
    """Fit jobs Snakemake ran: from its output, or for `fegrid run` (``folder``), from the log it keeps of it."""
    if folder is not None:
        return (folder / "reports/tiny/logs/snakemake.log").read_text().count("rule fit_job:")
    return result.stdout.count("rule fit_job:") + result.stderr.count("rule fit_job:")


def _work_logs(folder: Path) -> dict[str, dict]:
    """Work logs of the fit jobs, by job key."""
    return {p.stem: json.loads(p.read_text()) for p in (folder / "reports/tiny/cache/fits").glob("*.json")}


@pytest.fixture(scope="module")
def fitted_once(tmp_path_factory, grunfeld: pd.DataFrame) -> tuple[Path, subprocess.CompletedProcess]:
    """The tiny grid (conftest.py) run once through Snakemake; tests work on copies of the folder."""
    from conftest import TINY_CONFIG

    folder = tmp_path_factory.mktemp("fitted_once")
    grunfeld.to_csv(folder / "grunfeld.csv", index=False)
    (folder / "grid.yaml").write_text(TINY_CONFIG)
    env = dict(os.environ)
    env["PATH"] = str(Path(sys.executable).parent) + os.pathsep + env.get("PATH", "")
    first = _snakemake(folder, env)
    assert first.returncode == 0, first.stderr[-3000:]
    return folder, first


@pytest.fixture()
def fitted(fitted_once, tmp_path: Path) -> Path:
    """A copy of the fitted folder (time stamps and Snakemake's records kept)."""
    copy = tmp_path / "project"
    shutil.copytree(fitted_once[0], copy, symlinks=True)
    return copy


def test_a_run_writes_the_ledger_the_engine_computes(fitted_once) -> None:
    folder, first = fitted_once
    ledger = pd.read_csv(folder / "reports/tiny/ledger.csv")
    assert list(ledger.columns) == list(LEDGER_COLUMNS)
    assert ledger["spec_id"].is_monotonic_increasing and ledger["spec_id"].is_unique
    assert len(ledger) == 2 * 2 * 2 * 2 * 2  # focal x absorb x clustering x sample x usable controls
    assert ledger["is_baseline"].sum() == 1 and (ledger["status"] == "ok").all()
    assert (folder / "reports/tiny/ledger.parquet").is_file()
    assert _fitted_jobs(first) > 1  # several jobs (specs_per_job: 4)
    # the ledger's numbers are the engine's: check the baseline against a direct fit
    base = ledger[ledger["is_baseline"]].iloc[0]
    data = pd.read_csv(folder / "grunfeld.csv")
    direct = fit_one(data, "invest", "value", controls=["capital"], absorb=parse_absorb(["firm", "year"]),
                     inference=Inference("clustered", (("firm",),)))
    assert base["estimate"] == pytest.approx(direct.estimate, rel=1e-12)
    assert base["std_error"] == pytest.approx(direct.std_error, rel=1e-12)


def test_a_rerun_does_nothing(fitted: Path, fegrid_env: dict) -> None:
    again = _snakemake(fitted, fegrid_env)
    assert again.returncode == 0 and "Nothing to be done" in again.stdout + again.stderr


def test_touching_or_rewriting_the_data_fits_nothing(fitted: Path, fegrid_env: dict) -> None:
    before = (fitted / "reports/tiny/ledger.csv").read_bytes()
    data_file = fitted / "grunfeld.csv"
    os.utime(data_file, (time.time() + 100, time.time() + 100))
    data_file.write_bytes(data_file.read_bytes())
    touched = _snakemake(fitted, fegrid_env)
    assert touched.returncode == 0 and _fitted_jobs(touched) == 0
    assert (fitted / "reports/tiny/ledger.csv").read_bytes() == before


def test_an_added_clustering_fits_only_the_new_specifications(fitted: Path, fegrid_env: dict) -> None:
    """One more clustering choice: only additions in the ledger, no demeaning redone."""
    ledger_path = fitted / "reports/tiny/ledger.csv"
    ledger = pd.read_csv(ledger_path)
    logs_before = set(_work_logs(fitted))
    config = (fitted / "grid.yaml").read_text()
    config = config.replace("  firm: {kind: clustered, by: firm}",
                            "  firm: {kind: clustered, by: firm}\n"
                            "  firm_year: {kind: two_way_clustered, by: [firm, year]}")
    (fitted / "grid.yaml").write_text(config)
    plan = _fegrid(fitted, fegrid_env, "plan", "--config", "grid.yaml")
    assert plan.returncode == 0 and "to fit: 16" in plan.stdout, plan.stdout
    added = _snakemake(fitted, fegrid_env)
    assert added.returncode == 0, added.stderr[-3000:]
    new_logs = {k: v for k, v in _work_logs(fitted).items() if k not in logs_before}
    assert new_logs and all(v["columns_demeaned"] == 0 for v in new_logs.values())
    assert sum(v["specs_fitted"] for v in new_logs.values()) == 16
    assert sum(v["specs_reused"] for v in new_logs.values()) == len(ledger)
    grown = pd.read_csv(ledger_path)
    assert len(grown) == len(ledger) + 16
    old = grown[grown["spec_id"].isin(ledger["spec_id"])].reset_index(drop=True)
    pd.testing.assert_frame_equal(old, ledger)


def test_kill_and_resume_gives_identical_ledger(tiny_project: Path, tmp_path_factory, fegrid_env) -> None:
    config = (tiny_project / "grid.yaml").read_text().replace(
        "  postwar: {range: {year: {min: 1946}}}",
        "  postwar: {range: {year: {min: 1946}}}\n  without: {drop_each: firm}")
    config = config.replace("jobs: {specs_per_job: 4}", "jobs: {specs_per_job: 16}")
    (tiny_project / "grid.yaml").write_text(config)

    reference = tmp_path_factory.mktemp("uninterrupted")
    for name in ("grunfeld.csv", "grid.yaml"):
        (reference / name).write_bytes((tiny_project / name).read_bytes())
    clean = _fegrid(reference, fegrid_env, "run", "--config", "grid.yaml", "-c", "2", "--quiet")
    assert clean.returncode == 0, clean.stderr[-3000:]

    proc = subprocess.Popen([sys.executable, "-m", "fegrid.cli", "run", "--config", "grid.yaml", "-c", "1",
                             "--quiet"], cwd=tiny_project, env=fegrid_env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, start_new_session=True)
    fits = tiny_project / "reports/tiny/cache/fits"
    deadline = time.time() + 300
    while time.time() < deadline and len(list(fits.glob("*.parquet"))) < 3:
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    done_before = len(list(fits.glob("*.parquet")))
    assert 3 <= done_before
    assert not (tiny_project / "reports/tiny/ledger.csv").exists()

    resumed = _fegrid(tiny_project, fegrid_env, "run", "--config", "grid.yaml", "-c", "2", "--quiet")
    assert resumed.returncode == 0, resumed.stderr[-3000:]
    # the jobs finished before the kill are not fitted again (but one killed between writing its
    # file and Snakemake's bookkeeping may run again)
    assert 1 <= _fitted_jobs(resumed, tiny_project) <= len(list(fits.glob("*.parquet"))) - done_before + 1
    assert (tiny_project / "reports/tiny/ledger.csv").read_bytes() == (
        reference / "reports/tiny/ledger.csv").read_bytes()


def test_serial_and_parallel_runs_give_the_same_bytes(tiny_project: Path, tmp_path_factory,
                                                      fegrid_env) -> None:
    other = tmp_path_factory.mktemp("serial")
    for name in ("grunfeld.csv", "grid.yaml"):
        (other / name).write_bytes((tiny_project / name).read_bytes())
    a = _fegrid(tiny_project, fegrid_env, "run", "--config", "grid.yaml", "-c", "2", "--quiet")
    b = _fegrid(other, fegrid_env, "run", "--config", "grid.yaml", "-c", "1", "--quiet")
    assert a.returncode == 0 and b.returncode == 0, a.stderr[-2000:] + b.stderr[-2000:]
    for name in ("ledger.csv", "ledger.parquet"):
        assert (tiny_project / "reports/tiny" / name).read_bytes() == (other / "reports/tiny" / name).read_bytes()
    # what is left to fit is counted while Snakemake starts, and shown before any progress line
    lines = [line for line in a.stdout.splitlines() if line.startswith("fegrid: ")]
    assert lines[0].startswith("fegrid: run 'tiny': ") and "to fit;" in lines[0], a.stdout
    assert any(line.startswith("fegrid: fits: done") for line in lines[1:]), a.stdout
    # the provenance job is timed like every other job, though the manifest it writes cannot hold its time
    run = tiny_project / "reports/tiny"
    assert (run / "benchmarks/write_provenance/all.tsv").is_file()
    stages = json.loads((run / "manifest.json").read_text())["stages"]
    assert "fit_job" in stages and "write_provenance" not in stages


def test_bad_data_through_snakemake_leaves_the_ledger(tiny_project: Path, fegrid_env) -> None:
    assert _snakemake(tiny_project, fegrid_env).returncode == 0
    ledger = (tiny_project / "reports/tiny/ledger.csv").read_bytes()
    data = pd.read_csv(tiny_project / "grunfeld.csv")
    pd.concat([data, data.iloc[[0]]]).to_csv(tiny_project / "grunfeld.csv", index=False)
    failed = _snakemake(tiny_project, fegrid_env, "--show-failed-logs")
    assert failed.returncode != 0
    assert "panel keys (firm, year) are not unique" in failed.stdout + failed.stderr
    assert (tiny_project / "reports/tiny/ledger.csv").read_bytes() == ledger


def test_snakemake_lint(tiny_project: Path, fegrid_env) -> None:
    lint = _snakemake(tiny_project, fegrid_env, "--lint")
    assert lint.returncode == 0, lint.stdout[-3000:] + lint.stderr[-3000:]


def test_reports_and_snakemake_report(tiny_project: Path, fegrid_env) -> None:
    run_log = _snakemake(tiny_project, fegrid_env)
    assert run_log.returncode == 0
    # the first answer comes first: ledger, summary and figures are done before any draw starts
    text = run_log.stdout + run_log.stderr
    first_draw = text.index("rule draw_null_curves:")
    for rule in ("gather_ledger", "summarise_curve", "draw_curve"):
        assert text.rindex(f"(Rule: {rule})") < first_draw, rule
    run = tiny_project / "reports/tiny"
    for name in ("summary.csv", "summary.md", "summary.tex", "choices.csv", "joint_tests.csv", "appendix.tex",
                 "manifest.json", "REPLICATION.md", "figures/curve-invest--value.png",
                 "figures/curve-invest--capital.pdf"):
        assert (run / name).is_file(), name
    manifest = json.loads((run / "manifest.json").read_text())
    assert manifest["specifications"] == 32 and manifest["seeds"] == {"joint_inference.seed": 7}
    assert {"fit_job", "gather_ledger", "draw_null_curves"} <= set(manifest["stages"])
    joint = pd.read_csv(run / "joint_tests.csv")
    assert set(joint["statistic"]) == {"median_estimate", "share_significant", "stouffer_z"}
    assert (joint["draws"] == 20).all()
    if shutil.which("pdflatex"):
        assert (run / "appendix.pdf").read_bytes()[:4] == b"%PDF"
    html = tiny_project / "report.html"
    made = _snakemake(tiny_project, fegrid_env, "--report", str(html))
    assert made.returncode == 0, made.stderr[-3000:]
    assert html.stat().st_size > 10_000


def _children(pid: int) -> list[int]:
    """Processes whose parent is ``pid`` (from /proc)."""
    out = []
    for status in Path("/proc").glob("[0-9]*/status"):
        try:
            fields = dict(line.split(":\t", 1) for line in status.read_text().splitlines() if ":\t" in line)
        except OSError:
            continue
        if fields.get("PPid", "").strip() == str(pid):
            out.append(int(status.parent.name))
    return sorted(out)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    status = Path(f"/proc/{pid}/status")
    return not (status.exists() and "\nState:\tZ" in status.read_text())


def _start_run(folder: Path, env: dict) -> tuple[subprocess.Popen, int]:
    """`fegrid run` in the background; returns it and its Snakemake child once a job is running."""
    proc = subprocess.Popen([sys.executable, "-m", "fegrid.cli", "run", "--config", "grid.yaml", "-c", "1",
                             "--quiet"], cwd=folder, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            text=True)
    deadline = time.time() + 120
    while time.time() < deadline and proc.poll() is None:
        children = _children(proc.pid)
        if children and _children(children[0]):  # Snakemake, and one of its jobs
            return proc, children[0]
        time.sleep(0.05)
    raise AssertionError("fegrid run started no Snakemake job: " + proc.communicate()[1][-3000:])


@pytest.mark.skipif(not Path("/proc/self/task").exists(), reason="needs /proc to find the Snakemake child")
def test_stopping_fegrid_run_stops_snakemake_and_a_killed_one_keeps_the_lock(tiny_project: Path,
                                                                             fegrid_env) -> None:
    # SIGTERM to `fegrid run` alone: Snakemake is stopped too, and the run says so
    proc, child = _start_run(tiny_project, fegrid_env)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode != 0 and "interrupted" in err, err[-2000:]
    assert not _alive(child)

    # SIGKILL to `fegrid run` alone: its Snakemake goes on, and holds the lock until it is done
    proc, child = _start_run(tiny_project, fegrid_env)
    proc.kill()
    proc.wait()
    assert _alive(child)
    second = _fegrid(tiny_project, fegrid_env, "run", "--config", "grid.yaml", "--quiet")
    assert second.returncode == 2 and "is working on this run folder" in second.stderr
    plain = _snakemake(tiny_project, fegrid_env)
    assert plain.returncode != 0 and "is working on this run folder" in plain.stdout + plain.stderr
    deadline = time.time() + 300
    while _alive(child) and time.time() < deadline:
        time.sleep(0.2)
    done = _fegrid(tiny_project, fegrid_env, "run", "--config", "grid.yaml", "--quiet")
    assert done.returncode == 0, done.stderr[-3000:]


def test_a_late_failure_puts_the_previous_results_back_as_a_set(tiny_project: Path, fegrid_env,
                                                                tmp_path_factory) -> None:
    """The appendix fails to compile after the ledger and figures were rewritten for a changed grid
    (a pdflatex that fails stands in for a full disk): every published file must then be the
    previous run's, byte for byte, and the message must say so."""
    env = dict(fegrid_env)
    first = _fegrid(tiny_project, env, "run", "--config", "grid.yaml", "--quiet")
    assert first.returncode == 0, first.stderr[-3000:]
    run = tiny_project / "reports/tiny"
    published = {p.relative_to(run): p.read_bytes() for p in run.rglob("*") if p.is_file()
                 and p.relative_to(run).parts[0] not in {"cache", "logs", "benchmarks", ".lock", ".previous"}}
    assert {Path("manifest.json"), Path("REPLICATION.md"), Path("ledger.csv")} <= set(published)

    fake = tmp_path_factory.mktemp("fakebin")
    (fake / "pdflatex").write_text("#!/bin/sh\necho 'disk full' >&2\nexit 1\n")
    (fake / "pdflatex").chmod(0o755)
    env["PATH"] = f"{fake}{os.pathsep}{env['PATH']}"
    text = (tiny_project / "grid.yaml").read_text().replace(
        "  firm: {kind: clustered, by: firm}",
        "  firm: {kind: clustered, by: firm}\n  year: {kind: clustered, by: year}")
    (tiny_project / "grid.yaml").write_text(text)
    failed = _fegrid(tiny_project, env, "run", "--config", "grid.yaml", "--quiet")
    assert failed.returncode != 0
    assert "were put back" in failed.stderr, failed.stderr[-3000:]
    # Snakemake's per-job log is silenced, so fegrid shows the failed job's own log
    assert "compile_appendix.log failed" in failed.stderr and "did not compile" in failed.stderr
    now = {p.relative_to(run): p.read_bytes() for p in run.rglob("*") if p.is_file()
           and p.relative_to(run).parts[0] not in {"cache", "logs", "benchmarks", ".lock", ".previous"}}
    assert set(now) == set(published)
    assert all(now[k] == published[k] for k in published), [str(k) for k in published if now[k] != published[k]]

    # with a working setup the changed grid runs through, and figures it no longer declares go
    del env["PATH"]
    env["PATH"] = fegrid_env["PATH"]
    (run / "figures" / "curve-invest--gone.png").write_bytes(b"left over")
    again = _fegrid(tiny_project, env, "run", "--config", "grid.yaml", "--quiet")
    assert again.returncode == 0, again.stderr[-3000:]
    assert len(pd.read_csv(run / "ledger.csv")) == 48
    assert not (run / "figures" / "curve-invest--gone.png").exists() and not (run / ".previous").exists()


def _lean(folder: Path) -> None:
    """The tiny grid in one fit job and without its joint tests' draws (what these tests check is neither)."""
    text = (folder / "grid.yaml").read_text()
    draws, jobs = "joint_inference: {draws: 20, draws_per_job: 10, seed: 7}", "jobs: {specs_per_job: 4}"
    assert draws in text and jobs in text
    (folder / "grid.yaml").write_text(text.replace(draws, "joint_inference: {draws: 0}")
                                      .replace(jobs, "jobs: {specs_per_job: 500}"))


def _add_year_clustering(folder: Path) -> None:
    firm = "  firm: {kind: clustered, by: firm}"
    text = (folder / "grid.yaml").read_text().replace(firm, firm + "\n  year: {kind: clustered, by: year}")
    (folder / "grid.yaml").write_text(text)


def test_a_reader_that_goes_away_does_not_stop_the_run(tiny_project: Path, fegrid_env) -> None:
    """`fegrid run | head -n 1`: the progress lines' reader goes away after the first line. The run goes on
    and publishes the changed grid's ledger, exits 0, and shows no traceback (before: the progress thread
    died with a traceback, the run's new results were replaced by the previous run's, and Snakemake's
    records called them up to date, so the next run did nothing either)."""
    _lean(tiny_project)
    first = _fegrid(tiny_project, fegrid_env, "run", "--config", "grid.yaml", "--quiet")
    assert first.returncode == 0, first.stderr[-3000:]
    ledger = tiny_project / "reports/tiny/ledger.csv"
    assert len(pd.read_csv(ledger)) == 32
    _add_year_clustering(tiny_project)
    proc = subprocess.Popen([sys.executable, "-m", "fegrid.cli", "run", "--config", "grid.yaml", "-c", "1"],
                            cwd=tiny_project, env=fegrid_env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    assert proc.stdout is not None and proc.stdout.readline().startswith("fegrid: run 'tiny'")
    proc.stdout.close()
    _, err = proc.communicate(timeout=600)
    assert proc.returncode == 0 and "Traceback" not in err and "Error" not in err, err[-3000:]
    assert len(pd.read_csv(ledger)) == 48
    again = _fegrid(tiny_project, fegrid_env, "run", "--config", "grid.yaml")
    assert again.returncode == 0 and "0 to fit" in again.stdout and "(48 specifications)" in again.stdout


def _published(run: Path) -> dict[Path, bytes]:
    """The run folder's published files (not its working state), by path, with their bytes."""
    return {p.relative_to(run): p.read_bytes() for p in run.rglob("*") if p.is_file()
            and p.relative_to(run).parts[0] not in {"cache", "logs", "benchmarks", ".lock", ".previous"}}


def _fail_on_fegrids_side(folder: Path, env: dict, monkeypatch, *, unmarked: bool = False) -> None:
    """`fegrid run` in this process, its progress monitor breaking once Snakemake is done (standing in for
    any error of fegrid's own while Snakemake works); ``unmarked``: put the previous files back without
    marking the folder, as 0.6.8 did."""
    import fegrid.cli as cli

    class Broken(cli.RunMonitor):
        def __exit__(self, *exc: object) -> None:
            super().__exit__(*exc)
            raise RuntimeError("the progress monitor broke")

    with monkeypatch.context() as patch:
        patch.chdir(folder)
        patch.setenv("PATH", env["PATH"])
        patch.setattr(cli, "RunMonitor", Broken)
        if unmarked:
            patch.setattr(cli, "_put_back", lambda outputs, paths: outputs.restore_previous())
        with pytest.raises(RuntimeError, match="monitor broke"):
            cli.main(["run", "--config", "grid.yaml", "-c", "1", "--quiet"])


def _fitted_then_changed(folder: Path, env: dict) -> tuple[Path, dict[Path, bytes]]:
    """The lean tiny grid run once (32 specifications), then the config changed to 48: the run folder and its
    published files as that first run left them."""
    _lean(folder)
    first = _fegrid(folder, env, "run", "--config", "grid.yaml", "--quiet")
    assert first.returncode == 0, first.stderr[-3000:]
    run = folder / "reports/tiny"
    before = _published(run)
    _add_year_clustering(folder)
    return run, before


def test_when_fegrid_fails_during_a_run_the_next_run_redoes_what_was_put_back(tiny_project: Path, fegrid_env,
                                                                             monkeypatch) -> None:
    """fegrid's own side fails while Snakemake works (the jobs are done by then): the previous run's files are
    put back, byte for byte, and the next run rebuilds them for the changed grid instead of finding
    Snakemake's records of the failed run's files and calling the put-back ones up to date (before: it ran
    nothing and left the previous grid's 32-row ledger under a 48-specification config)."""
    run, before = _fitted_then_changed(tiny_project, fegrid_env)
    _fail_on_fegrids_side(tiny_project, fegrid_env, monkeypatch)
    assert _published(run) == before and (run / "cache/put-back").is_file()
    again = _fegrid(tiny_project, fegrid_env, "run", "--config", "grid.yaml", "--quiet")
    assert again.returncode == 0, again.stderr[-3000:]
    assert len(pd.read_csv(run / "ledger.csv")) == 48 and not (run / "cache/put-back").exists()


def test_a_run_that_fails_before_any_job_leaves_the_next_run_to_fit_the_changed_grid(tiny_project: Path,
                                                                                   fegrid_env) -> None:
    """Snakemake fails before any job runs (an executor it cannot load stands in for a cluster it cannot
    reach): nothing was written over, and the next run fits the changed grid's new specifications and
    rebuilds the ledger (before: the failed run's cleanup had dropped Snakemake's records of the published
    files, and without them Snakemake saw no reason to rerun a ledger that exists for a fit job whose result
    is missing: "nothing to be done", and the 32-row ledger stayed under the 48-specification config)."""
    run, before = _fitted_then_changed(tiny_project, fegrid_env)
    failed = _fegrid(tiny_project, fegrid_env, "run", "--config", "grid.yaml", "--quiet", "--",
                     "--executor", "no_such_executor")
    assert failed.returncode != 0 and "were put back" in failed.stderr, failed.stderr[-3000:]
    assert _published(run) == before
    again = _fegrid(tiny_project, fegrid_env, "run", "--config", "grid.yaml")
    assert again.returncode == 0, again.stderr[-3000:]
    assert "16 to fit" in again.stdout and len(pd.read_csv(run / "ledger.csv")) == 48


def test_a_ledger_put_back_under_records_of_another_is_rebuilt(tiny_project: Path, fegrid_env, monkeypatch) -> None:
    """The state a run of 0.6.8 left when its progress lines' reader went away: the previous grid's files put
    back while Snakemake's records describe the new ones, every fit job done (made here as 0.6.8 made it:
    a failure on fegrid's side, with the records kept). The next run rebuilds the reports for the
    config's grid (before: "nothing to be done", and the 32-row ledger stayed under a 48-specification
    config for good)."""
    run, _ = _fitted_then_changed(tiny_project, fegrid_env)
    _fail_on_fegrids_side(tiny_project, fegrid_env, monkeypatch, unmarked=True)
    assert len(pd.read_csv(run / "ledger.csv")) == 32
    again = _fegrid(tiny_project, fegrid_env, "run", "--config", "grid.yaml")
    assert again.returncode == 0, again.stderr[-3000:]
    assert len(pd.read_csv(run / "ledger.csv")) == 48 and "(48 specifications)" in again.stdout
