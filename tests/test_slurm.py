"""The workflow on a real SLURM cluster: a single-node controller and node on this machine
(Debian's slurm-wlm and munge, started by tests/slurm/local_cluster.sh), the tiny grid submitted
through snakemake-executor-plugin-slurm with the project's profile, and the ledger compared with a
local run, byte for byte; and a queue that refuses every job (an `sbatch` stand-in), whose refusal the
failed run must name. Runs where slurmctld, root and the plugin are present (CI installs them).
"""

from __future__ import annotations

import importlib.util
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

pytestmark = [
    pytest.mark.slow,
    pytest.mark.skipif(shutil.which("slurmctld") is None or os.geteuid() != 0
                       or importlib.util.find_spec("snakemake_executor_plugin_slurm") is None,
                       reason="needs root, Debian's slurm-wlm and snakemake-executor-plugin-slurm"),
]

ROOT = Path(__file__).resolve().parents[1]  # the source checkout


@pytest.fixture(scope="module")
def cluster():
    script = ROOT / "tests" / "slurm" / "local_cluster.sh"
    up = subprocess.run(["bash", str(script), "start"], capture_output=True, text=True, timeout=600)
    assert up.returncode == 0, up.stdout + up.stderr
    yield
    subprocess.run(["bash", str(script), "stop"], capture_output=True, timeout=120)


def test_slurm_run_equals_local_run(cluster, tiny_project: Path, tmp_path_factory, fegrid_env) -> None:
    local = tmp_path_factory.mktemp("local")
    for name in ("grunfeld.csv", "grid.yaml"):
        (local / name).write_bytes((tiny_project / name).read_bytes())
    run_local = subprocess.run([sys.executable, "-m", "fegrid.cli", "run", "--config", "grid.yaml", "-c", "2",
                                "--quiet"], cwd=local, capture_output=True, text=True, env=fegrid_env, timeout=1200)
    assert run_local.returncode == 0, run_local.stderr[-3000:]
    slurm = subprocess.run(
        [sys.executable, "-m", "snakemake", "--snakefile", str(ROOT / "Snakefile"), "--directory", str(tiny_project),
         "--configfile", str(tiny_project / "grid.yaml"), "--workflow-profile",
         str(ROOT / "workflow" / "profiles" / "slurm"), "--jobs", "4"],
        cwd=tiny_project, capture_output=True, text=True, env=fegrid_env, timeout=2400)
    log = slurm.stdout + slurm.stderr
    assert slurm.returncode == 0, log[-4000:]
    assert log.count("has been submitted with SLURM jobid") >= 5  # the jobs went through sbatch
    for name in ("ledger.csv", "ledger.parquet", "joint_tests.csv"):
        assert (tiny_project / "reports/tiny" / name).read_bytes() == (local / "reports/tiny" / name).read_bytes()


def test_a_queue_that_refuses_the_jobs_is_named_in_the_failure(tiny_project: Path, tmp_path_factory,
                                                              fegrid_env) -> None:
    """`fegrid run --profile slurm` where `sbatch` refuses every job (a stand-in that prints SLURM's kind of
    error): the run fails, puts nothing over the earlier results, and says why in SLURM's own words (before:
    "Snakemake's log ends with:" and nothing, since the job left no log of its own and Snakemake's was
    silenced)."""
    fake = tmp_path_factory.mktemp("fakebin")
    (fake / "sbatch").write_text("#!/bin/sh\necho 'sbatch: error: Batch job submission failed: invented refusal' >&2\n"
                                 "exit 1\n")
    (fake / "sbatch").chmod(0o755)
    env = dict(fegrid_env, PATH=f"{fake}{os.pathsep}{fegrid_env['PATH']}")
    failed = subprocess.run([sys.executable, "-m", "fegrid.cli", "run", "--config", "grid.yaml", "--profile", "slurm",
                             "--quiet"], cwd=tiny_project, capture_output=True, text=True, env=env, timeout=600)
    assert failed.returncode != 0
    assert "Snakemake reported" in failed.stderr and "invented refusal" in failed.stderr, failed.stderr[-3000:]
    assert not (tiny_project / "reports/tiny/ledger.csv").exists()
