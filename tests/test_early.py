"""Snakemake started while ``fegrid run`` checks the grid (``fegrid.early``): the waiting process runs
exactly the command it is handed, with the environment, folder, output file and run lock it is handed;
it is stopped, having touched nothing, when the checks fail; and ``fegrid run`` starts Snakemake itself
when the waiting process is gone or switched off. (Whole runs through it: test_workflow.py and the
workflow tests of the fast tier, which all start Snakemake this way.)"""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import pytest

from fegrid import early
from fegrid.command import _runs_snakemake
from fegrid.errors import FegridError
from fegrid.lock import RunLock

pytestmark = pytest.mark.skipif(sys.platform == "win32", reason="descriptor passing is POSIX-only")

SLEEPER = """
rule all:
    shell:
        "echo $FEGRID_TEST_MARK > handed.txt; sleep 3"
"""


@pytest.mark.parametrize(("argv", "expected"), [
    (["run", "--config", "g.yaml"], True),
    (["demo", "-c", "2"], True),
    (["run", "-c", "2", "--", "--dry-run"], True),
    (["plan", "--config", "g.yaml"], False),
    (["run", "--help"], False),
    (["--version"], False),
    ([], False),
])
def test_the_command_starts_snakemake_ahead_only_for_run_and_demo(argv: list[str], expected: bool) -> None:
    assert _runs_snakemake(argv) is expected


def test_a_waiting_snakemake_runs_the_command_it_is_handed_and_holds_the_lock(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.delenv(early.OFF_ENV, raising=False)
    (tmp_path / "Snakefile").write_text(SLEEPER)
    waiting = early.EarlyStart.begin()
    assert waiting is not None
    lock = RunLock(tmp_path / "run.lock").acquire()
    log = tmp_path / "snakemake.log"
    command = [sys.executable, "-m", "snakemake", "--snakefile", str(tmp_path / "Snakefile"),
               "--directory", str(tmp_path), "--cores", "1"]
    with open(log, "wb") as sink:
        proc = waiting.launch(command, env={**RunLock.inheritable_env(lock), "FEGRID_TEST_MARK": "handed over"},
                              pass_fds=(lock.fileno(),), stdout=sink.fileno())
    assert proc is waiting.proc
    lock.release()  # this side lets go: the lock is now held only by the Snakemake process's copy
    deadline = time.time() + 60
    while not (tmp_path / "handed.txt").exists() and time.time() < deadline:
        time.sleep(0.05)
    assert (tmp_path / "handed.txt").read_text().strip() == "handed over"  # its environment and folder
    with pytest.raises(FegridError, match="is working on this run folder"):
        RunLock(tmp_path / "run.lock").acquire()
    assert proc.wait(timeout=60) == 0
    assert "1 of 1 steps (100%) done" in log.read_text()  # its output went to the file it was handed
    RunLock(tmp_path / "run.lock").acquire().release()  # and the lock went with it


def test_a_cancelled_waiting_process_is_gone_and_touched_nothing(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.delenv(early.OFF_ENV, raising=False)
    monkeypatch.chdir(tmp_path)
    waiting = early.EarlyStart.begin()
    assert waiting is not None
    time.sleep(0.3)  # mid-import
    waiting.cancel()
    assert waiting.proc.poll() is not None
    assert waiting.launch([sys.executable, "-m", "snakemake", "--version"], env={}) is None
    assert list(tmp_path.iterdir()) == []


def test_a_waiting_process_that_is_gone_leaves_the_start_to_fegrid(monkeypatch) -> None:
    monkeypatch.delenv(early.OFF_ENV, raising=False)
    waiting = early.EarlyStart.begin()
    assert waiting is not None
    waiting.proc.kill()
    waiting.proc.wait()
    assert waiting.launch([sys.executable, "-m", "snakemake", "--version"], env={}) is None
    monkeypatch.setenv(early.OFF_ENV, "1")
    assert early.EarlyStart.begin() is None


def test_a_run_that_stops_at_fegrid_s_checks_stops_the_waiting_snakemake(tmp_path: Path, monkeypatch) -> None:
    """A config error ends `fegrid run` with its one paragraph; the Snakemake process started with the command
    is gone, and left no trace in the folder."""
    import fegrid.cli

    monkeypatch.delenv(early.OFF_ENV, raising=False)
    monkeypatch.chdir(tmp_path)
    (tmp_path / "grid.yaml").write_text("run_name: broken\ndata: {path: nowhere.csv, unit: u}\noutcomes: [y]\n"
                                        "focal_regressors: [x]\n")
    started: list[subprocess.Popen] = []

    class Recorded(subprocess.Popen):
        def __init__(self, *args, **kwargs) -> None:
            super().__init__(*args, **kwargs)
            started.append(self)

    monkeypatch.setattr(subprocess, "Popen", Recorded)
    assert fegrid.cli.main(["run", "--config", "grid.yaml"]) == 2
    assert len(started) == 1 and started[0].args[1:3] == ["-m", "fegrid.early"]
    assert started[0].poll() is not None
    assert sorted(p.name for p in tmp_path.iterdir()) == ["grid.yaml"]


def test_ctrl_c_while_the_command_loads_ends_with_a_line_not_a_traceback(tmp_path: Path) -> None:
    """Ctrl-C before fegrid has loaded (pandas alone takes a quarter of a second): the command's own entry point
    says it was interrupted, exits 130, and leaves no waiting Snakemake behind. (A stand-in for fegrid.cli raises
    the interrupt where the import would take it.)"""
    code = ("import sys, types\n"
            "stand_in = types.ModuleType('fegrid.cli')\n"
            "def main():\n"
            "    raise KeyboardInterrupt\n"
            "stand_in.main = main\n"
            "sys.modules['fegrid.cli'] = stand_in\n"
            "sys.argv = ['fegrid', 'run', '--config', 'grid.yaml']\n"
            "from fegrid.command import main as command\n"
            "command()\n")
    proc = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 130, proc.stderr
    assert proc.stderr.strip() == "fegrid: interrupted; run the same command again to resume."
    assert list(tmp_path.iterdir()) == []


def test_a_snakemake_that_does_not_stop_is_ended(monkeypatch) -> None:
    """When fegrid's side fails during a run it stops Snakemake with SIGINT; a process that does not end (a Python
    process interrupted in the middle of an import can hang on its import lock) is killed after the grace
    period, so `fegrid run` never hangs on it."""
    import signal

    import fegrid.cli

    monkeypatch.setattr(fegrid.cli, "STOP_SECONDS", 0.5)
    stubborn = subprocess.Popen([sys.executable, "-c", "import signal, sys, time\n"
                                 "signal.signal(signal.SIGINT, signal.SIG_IGN)\n"
                                 "print('ready', flush=True)\n"
                                 "time.sleep(600)\n"], stdout=subprocess.PIPE, text=True)
    assert stubborn.stdout is not None and stubborn.stdout.readline().strip() == "ready"
    started = time.time()
    fegrid.cli._stop(stubborn)
    assert stubborn.returncode == -signal.SIGKILL and time.time() - started < 30
