"""Benchmark: ``fegrid demo`` cold, in an empty folder, as a new user runs it (not a test).

Printed, from one run: the wall time against issue 12's target (<= 90 s on 2 cores); when the ledger,
the summary and the curve figures (the first answer) were written, counted from the start; each stage's
jobs and seconds from the run's benchmark files (the draw jobs' CPU seconds too, also by their own
clocks: Snakemake samples CPU time and undercounts it); the seconds before the
first job started and after the last ended; and the seconds the SLURM executor plugin adds to
Snakemake's start where it is installed (see ``bench_pipeline.slurm_plugin_seconds``: 0 after the
README's install, about 10 s where SLURM's client is set up and no controller answers). fegrid's modules
are byte-compiled first, as an install does (see ``bench_pipeline.byte_compile_fegrid``).

    python tests/benchmarks/bench_demo.py [--cores 2] [--folder DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd

sys.path.insert(0, str(Path(__file__).parent))
from bench_pipeline import byte_compile_fegrid, slurm_plugin_seconds, work_folder  # noqa: E402

#: issue 12's target for the demo, cold, on 2 cores (wall seconds)
TARGET_SECONDS = 90.0


def stage_table(run: Path) -> tuple[dict[str, dict[str, float]], float, float]:
    """Per stage: jobs, wall seconds summed over jobs and CPU seconds; and the first job's start and the
    last job's end (epoch seconds), from the benchmark files' times and their modification times."""
    stages: dict[str, dict[str, float]] = {}
    starts, ends = [], []
    for path in sorted((run / "benchmarks").glob("*/*.tsv")):
        row = pd.read_csv(path, sep="\t").iloc[0]
        entry = stages.setdefault(path.parent.name, {"jobs": 0, "seconds": 0.0, "cpu_seconds": 0.0})
        entry["jobs"] += 1
        entry["seconds"] += float(row["s"])
        entry["cpu_seconds"] += float(pd.to_numeric(row.get("cpu_time", float("nan")), errors="coerce"))
        ends.append(path.stat().st_mtime)
        starts.append(ends[-1] - float(row["s"]))
    return ({k: {m: round(v, 1) for m, v in e.items()} for k, e in sorted(stages.items())},
            min(starts), max(ends))


def draw_jobs_cpu(run: Path) -> float | None:
    """The draw jobs' CPU seconds by their own clocks (the last line of each job's log); Snakemake's
    benchmark samples CPU time now and then, and misses much of a 30-second job."""
    total, found = 0.0, False
    for log in sorted((run / "logs" / "draw_null_curves").glob("*.log")):
        lines = log.read_text().strip().splitlines()
        try:
            total += float(json.loads(lines[-1])["cpu_seconds"])
            found = True
        except (IndexError, ValueError, KeyError, TypeError):
            continue
    return round(total, 1) if found else None


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--cores", type=int, default=2)
    ap.add_argument("--folder", help="an empty work folder (default: a temporary one)")
    args = ap.parse_args()
    folder = work_folder(args.folder, "fegrid-demo-")
    if any(folder.iterdir()):
        sys.exit(f"{folder} is not empty: the demo is timed cold")
    byte_compile_fegrid()
    started = time.time()
    # the `fegrid` command's own entry point (fegrid.command), which starts Snakemake while it checks the grid
    proc = subprocess.Popen([sys.executable, "-m", "fegrid.command", "demo", "-c", str(args.cores)], cwd=folder,
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    first_answer = None
    announced: set[str] = set()
    assert proc.stdout is not None
    for line in proc.stdout:  # the progress lines say when each part of the first answer is written
        for stage in ("ledger", "summary", "figures"):
            if line.startswith(f"fegrid: {stage}: done"):
                announced.add(stage)
        if first_answer is None and len(announced) == 3:
            first_answer = time.time() - started
    code = proc.wait()
    wall = time.time() - started
    if code != 0:
        sys.exit(f"fegrid demo failed with exit code {code}")
    run = folder / "reports" / "demo"
    stages, first_start, last_end = stage_table(run)
    if "draw_null_curves" in stages:
        stages["draw_null_curves"]["cpu_seconds_by_the_jobs_own_clocks"] = draw_jobs_cpu(run)
    answer = [run / "ledger.parquet", run / "summary.csv", *sorted((run / "figures").glob("*.png"))]
    written = max(p.stat().st_mtime for p in answer if p.exists() and "draw" not in p.name) - started
    probe = slurm_plugin_seconds()
    report = {
        "cores": args.cores,
        "wall_seconds": round(wall, 1),
        "target_wall_seconds": f"<= {TARGET_SECONDS:g} ({'met' if wall <= TARGET_SECONDS else 'not met'})",
        "first_answer_written_after_seconds": round(written, 1),
        "first_answer_announced_after_seconds": None if first_answer is None else round(first_answer, 1),
        "seconds_before_the_first_job": round(first_start - started, 1),
        "seconds_after_the_last_job": round(started + wall - last_end, 1),
        "slurm_plugin_import_seconds": round(probe, 1),
        "stages": stages,
        "threads_per_job": os.environ.get("OMP_NUM_THREADS", "1 (fegrid's default)"),
    }
    print(json.dumps(report, indent=2))


if __name__ == "__main__":
    main()
