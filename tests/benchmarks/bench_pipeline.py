"""Scale benchmark: 10,000 specifications on 100,000 rows through Snakemake, locally (not a test).

Data (seeded, synthetic): 5,000 units in 50 regions over 20 periods. Grid: 2 outcomes x 2 focal
regressors x 5 absorbed-effect choices x 5 covariance choices x 10 samples x 10 control sets =
10,000 specifications; joint tests off (their cost is reported by the demo).

Printed, from one cold run of ``fegrid run -c CORES``: wall time; time inside fegrid's fit step
(the jobs' own clocks); the jobs' wall time as Snakemake measured it (Python start-up included);
the share of wall time in which no job ran, from the jobs' benchmark files (Snakemake's own
work: parsing, DAG, scheduling, its end; and fegrid's checks before it starts, which Snakemake's
start-up overlaps: see ``fegrid.early``), split into the time before the first job and the time
between and after the jobs; the seconds a fresh interpreter takes to import Snakemake and build its
argument parser (Snakemake's own start, before it reads any workflow), and the share of wall time with
no job running that Snakemake alone would leave (its start plus the time between and after the jobs:
the floor under that share if fegrid's own start cost nothing); the seconds a fresh interpreter takes
to import Snakemake's SLURM executor plugin (see :func:`slurm_plugin_seconds`: where that probe
hangs, hide SLURM's client tools from PATH for a local measurement); the share of the fit jobs' time
spent outside the fit step (Python start-up, imports, reading the snapshot); peak memory of any process.

fegrid's modules are byte-compiled before the run (:func:`byte_compile_fegrid`), as pip does when it
installs the package: an editable install under ``PYTHONDONTWRITEBYTECODE`` (set on some machines, this
one included) otherwise compiles them again in every process, 0.1 s of each start.

    python tests/benchmarks/bench_pipeline.py [--rows 100000] [--cores 2] [--folder DIR]
"""

from __future__ import annotations

import argparse
import compileall
import importlib.util
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

PERIODS = 20


def make_data(rows: int, path: Path, seed: int = 2026) -> None:
    rng = np.random.default_rng(seed)
    units = rows // PERIODS
    unit = np.repeat(np.arange(units), PERIODS)
    t = np.tile(np.arange(PERIODS), units)
    region = unit % 50
    a = rng.normal(size=units)[unit]
    shock = rng.normal(size=(50, PERIODS))[region, t]
    df = pd.DataFrame({"unit": unit, "time": t, "region": region})
    for i in (1, 2, 3, 4):
        df[f"c{i}"] = 0.3 * a + rng.normal(size=rows)
    df["x1"] = 0.5 * a + 0.5 * shock + rng.normal(size=rows)
    df["x2"] = 0.2 * a + rng.normal(size=rows)
    controls = df[["c1", "c2", "c3", "c4"]].sum(axis=1)
    df["y1"] = df["x1"] + 0.5 * df["x2"] + a + shock + 0.1 * controls + rng.normal(size=rows)
    df["y2"] = 0.3 * df["x1"] + a + rng.normal(size=rows)
    df.to_parquet(path, index=False)


def job_intervals(benchmarks: list[Path]) -> list[tuple[float, float]]:
    """Each job's (start, end) in clock seconds: its interval ends when Snakemake wrote its benchmark
    file and lasts the wall time the file records (``fegrid run`` shows its own progress lines, so
    Snakemake's log holds no time stamps to read)."""
    intervals = []
    for p in benchmarks:
        end = p.stat().st_mtime
        intervals.append((end - float(pd.read_csv(p, sep="\t").iloc[0]["s"]), end))
    return sorted(intervals)


def busy_seconds(intervals: list[tuple[float, float]]) -> float:
    """Seconds in which at least one of the jobs (:func:`job_intervals`) ran."""
    total, end = 0.0, -1.0
    for a, b in intervals:
        if b <= end:
            continue
        total += b - max(a, end)
        end = b
    return total


def fresh_seconds(code: str) -> float:
    """Wall seconds a fresh interpreter takes to run ``code``."""
    start = time.perf_counter()
    subprocess.run([sys.executable, "-c", code], capture_output=True)
    return time.perf_counter() - start


def slurm_plugin_seconds() -> float:
    """Wall seconds to import Snakemake's SLURM executor plugin in a fresh interpreter (0 when it is not
    installed), less a bare interpreter's start. Snakemake imports every installed executor plugin at
    start, even for a local run, and this one runs ``scontrol show config`` when imported: about 10 s
    where SLURM's client is configured and no controller answers (this machine, between SLURM tests)."""
    if importlib.util.find_spec("snakemake_executor_plugin_slurm") is None:
        return 0.0
    return max(fresh_seconds("import snakemake_executor_plugin_slurm")
               - fresh_seconds("import snakemake_interface_executor_plugins"), 0.0)


def snakemake_start_seconds() -> float:
    """Wall seconds a fresh interpreter takes to import Snakemake and build its argument parser (which
    collects its installed plugins), less a bare interpreter's start: what any Snakemake run spends
    before it can read a workflow, whatever the workflow. Measured three times; the least."""
    code = ("from snakemake.cli import get_argument_parser; get_argument_parser(); "
            "import snakemake.api, snakemake.workflow")
    return max(min(fresh_seconds(code) for _ in range(3)) - min(fresh_seconds("pass") for _ in range(3)), 0.0)


def byte_compile_fegrid() -> None:
    """Write the byte code of fegrid's modules where it is missing or stale, as ``pip install`` does (an
    editable install leaves it to the first import, which does not write it under
    ``PYTHONDONTWRITEBYTECODE``): the run then measures an installed fegrid, not its compiler."""
    spec = importlib.util.find_spec("fegrid")
    for folder in (spec.submodule_search_locations or []) if spec else []:
        compileall.compile_dir(folder, quiet=1)


def work_folder(path: str | None, prefix: str) -> Path:
    """The benchmark's work folder: ``path``, or a new temporary one."""
    folder = Path(path or tempfile.mkdtemp(prefix=prefix))
    folder.mkdir(parents=True, exist_ok=True)
    return folder


def config(data: Path) -> dict:
    controls = {"none": [], "c1": ["c1"], "c2": ["c2"], "c3": ["c3"], "c4": ["c4"], "c12": ["c1", "c2"],
                "c34": ["c3", "c4"], "c123": ["c1", "c2", "c3"], "c234": ["c2", "c3", "c4"],
                "all": ["c1", "c2", "c3", "c4"]}
    samples = {"all": {}, **{f"from_{k}": {"range": {"time": {"min": k}}} for k in range(1, 9)},
               "balanced_last_10": {"range": {"time": {"min": 10}}, "balanced": True}}
    return {
        "run_name": "scale",
        "data": {"path": str(data), "unit": "unit", "time": "time"},
        "outcomes": ["y1", "y2"],
        "focal_regressors": ["x1", "x2"],
        "absorb": {"none": [], "unit": ["unit"], "unit_time": ["unit", "time"],
                   "unit_region_time": ["unit", "region x time"], "trend_time": [{"trend": "unit"}, "time"]},
        "clustering": {"iid": {"kind": "homoskedastic"}, "robust": {"kind": "hc1"},
                       "unit": {"kind": "clustered", "by": "unit"},
                       "region": {"kind": "clustered", "by": "region"},
                       "unit_time": {"kind": "two_way_clustered", "by": ["unit", "time"]}},
        "samples": samples,
        "control_sets": {"named": controls},
        "joint_inference": {"draws": 0},
        "jobs": {"specs_per_job": 2000},
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=100_000)
    ap.add_argument("--cores", type=int, default=2)
    ap.add_argument("--folder", help="work folder (default: a temporary one)")
    args = ap.parse_args()
    folder = work_folder(args.folder, "fegrid-scale-")
    data = folder / "panel.parquet"
    make_data(args.rows, data)
    cfg = config(data)
    (folder / "grid.yaml").write_text(yaml.safe_dump(cfg))
    byte_compile_fegrid()
    start, launched = time.perf_counter(), time.time()
    # the `fegrid` command's own entry point (fegrid.command), which starts Snakemake while it checks the grid
    command = [sys.executable, "-m", "fegrid.command", "run", "--config", "grid.yaml", "-c", str(args.cores), "--quiet"]
    proc = subprocess.run(command, cwd=folder, capture_output=True, text=True)
    wall = time.perf_counter() - start
    if proc.returncode != 0:
        sys.exit(proc.stdout[-3000:] + proc.stderr[-3000:])
    run = folder / "reports" / "scale"
    ledger = pd.read_parquet(run / "ledger.parquet")
    logs = [json.loads(p.read_text()) for p in (run / "cache" / "fits").glob("*.json")]
    bench = {}
    for p in (run / "benchmarks").glob("*/*.tsv"):
        row = pd.read_csv(p, sep="\t").iloc[0]
        entry = bench.setdefault(p.parent.name, {"jobs": 0, "seconds": 0.0, "max_rss_mb": 0.0})
        entry["jobs"] += 1
        entry["seconds"] += float(row["s"])
        entry["max_rss_mb"] = max(entry["max_rss_mb"], float(pd.to_numeric(row["max_rss"], errors="coerce") or 0))
    fit_inside = sum(log["seconds"] for log in logs)
    job_seconds = sum(b["seconds"] for b in bench.values())
    intervals = job_intervals(sorted((run / "benchmarks").glob("*/*.tsv")))
    busy = busy_seconds(intervals)
    peak_children_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    probe = slurm_plugin_seconds()
    snakemake_start = snakemake_start_seconds()
    idle = max(wall - busy, 0)
    first_job = max(intervals[0][0] - launched, 0.0)
    idle_later = max(idle - first_job, 0.0)  # between jobs and after the last one
    report = {
        "rows": args.rows,
        "specifications": len(ledger),
        "status": ledger["status"].value_counts().to_dict(),
        "fit_jobs": len(logs),
        "cores": args.cores,
        "wall_seconds": round(wall, 1),
        "fit_seconds_inside_fegrid": round(fit_inside, 1),
        "job_seconds_as_measured_by_snakemake": round(job_seconds, 1),
        "per_rule": {k: {"jobs": v["jobs"], "seconds": round(v["seconds"], 1), "max_rss_mb": round(v["max_rss_mb"])}
                     for k, v in sorted(bench.items())},
        "seconds_with_a_job_running": round(busy, 1),
        "share_of_wall_with_no_job_running": round(idle / wall, 3),
        "first_job_started_after_seconds": round(first_job, 2),
        "seconds_with_no_job_running_after_the_first_job_started": round(idle_later, 2),
        "snakemake_start_seconds": round(snakemake_start, 2),
        "slurm_plugin_import_seconds": round(probe, 1),
        # what the share would be if fegrid's own start (imports, checks, plan) cost nothing: Snakemake's start
        # plus the time between and after the jobs
        "share_of_wall_with_no_job_running_from_snakemake_alone": round((snakemake_start + idle_later) / wall, 3),
        "share_of_job_time_outside_the_fit_step": round(
            1 - fit_inside / max(bench.get("fit_job", {}).get("seconds", fit_inside), 1e-9), 3),
        "peak_memory_mb_any_process": round(peak_children_mb),
        "target_share_of_wall_with_no_job_running": "<= 0.05 (issue 12, at 10,000 specifications)",
    }
    print(json.dumps(report, indent=2))


if __name__ == "__main__":
    main()
