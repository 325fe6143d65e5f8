"""Planning benchmark: a grid of 128,000 specifications in about 1,000 fit jobs (not a test).

Data (seeded, synthetic): the panel of ``bench_pipeline.py`` with seven optional controls. Grid:
2 outcomes x 2 focal regressors x 5 absorbed-effect choices x 5 covariance choices x 10 samples x
128 control sets (every combination of 7 controls), cut into jobs of 128 specifications.

Printed, from one run: the time to plan the grid (read and check the config, hash the data, expand
the grid, cut it into jobs), to save the plan, and to plan again with config and data unchanged
(the saved plan is read back); the time Snakemake takes from start to its first
job (a dry run: parse, plan, DAG); and, for one fit job, the time its process spends before fitting
(Snakemake's parse of the Snakefile, reading its own specifications, reading the snapshot) against
the time it spends fitting, once with the saved plan and once expanding the grid again (how jobs
worked before the plan was saved).

    python tests/benchmarks/bench_plan.py [--rows 100000] [--folder DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

from fegrid.locations import SNAKEFILE
from fegrid.pipeline import PLAN_ENV, fit_job, make_plan, plan_for_job, save_plan, snapshot_data

CONTROLS = [f"c{i}" for i in range(1, 8)]


def make_data(rows: int, path: Path, seed: int = 2026) -> None:
    rng = np.random.default_rng(seed)
    periods = 20
    units = rows // periods
    unit = np.repeat(np.arange(units), periods)
    t = np.tile(np.arange(periods), units)
    a = rng.normal(size=units)[unit]
    df = pd.DataFrame({"unit": unit, "time": t, "region": unit % 50})
    for c in CONTROLS:
        df[c] = 0.3 * a + rng.normal(size=rows)
    df["x1"] = 0.5 * a + rng.normal(size=rows)
    df["x2"] = 0.2 * a + rng.normal(size=rows)
    df["y1"] = df["x1"] + a + 0.1 * df[CONTROLS].sum(axis=1) + rng.normal(size=rows)
    df["y2"] = 0.3 * df["x2"] + a + rng.normal(size=rows)
    df.to_parquet(path, index=False)


def config(data: Path) -> dict:
    samples = {"all": {}, **{f"from_{k}": {"range": {"time": {"min": k}}} for k in range(1, 9)},
               "balanced_last_10": {"range": {"time": {"min": 10}}, "balanced": True}}
    return {
        "run_name": "plan", "data": {"path": str(data), "unit": "unit", "time": "time"},
        "outcomes": ["y1", "y2"], "focal_regressors": ["x1", "x2"],
        "absorb": {"none": [], "unit": ["unit"], "unit_time": ["unit", "time"],
                   "unit_region_time": ["unit", "region x time"], "trend_time": [{"trend": "unit"}, "time"]},
        "clustering": {"iid": {"kind": "homoskedastic"}, "robust": {"kind": "hc1"},
                       "unit": {"kind": "clustered", "by": "unit"}, "region": {"kind": "clustered", "by": "region"},
                       "unit_time": {"kind": "two_way_clustered", "by": ["unit", "time"]}},
        "samples": samples, "control_sets": {"combinations_of": CONTROLS},
        "joint_inference": {"draws": 0}, "jobs": {"specs_per_job": 128},
    }


def _seconds(fn, *args, **kw) -> tuple[float, object]:
    start = time.perf_counter()
    out = fn(*args, **kw)
    return time.perf_counter() - start, out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=100_000)
    ap.add_argument("--folder", help="work folder (default: a temporary one)")
    args = ap.parse_args()
    folder = Path(args.folder or tempfile.mkdtemp(prefix="fegrid-plan-"))
    folder.mkdir(parents=True, exist_ok=True)
    os.chdir(folder)
    make_data(args.rows, folder / "panel.parquet")
    (folder / "grid.yaml").write_text(yaml.safe_dump(config(folder / "panel.parquet")))

    plan_s, plan = _seconds(make_plan, "grid.yaml")
    save_s, saved = _seconds(save_plan, plan)
    replan_s, _ = _seconds(make_plan, "grid.yaml")  # the same config and data: the saved plan is read back
    snapshot_data(plan.grid, plan.snapshot_path, plan.data_sha256)
    start = time.perf_counter()
    dry = subprocess.run([sys.executable, "-m", "snakemake", "--snakefile", str(SNAKEFILE), "--configfile",
                          "grid.yaml", "-n", "--quiet", "rules"], capture_output=True, text=True)
    dry_s = time.perf_counter() - start
    if dry.returncode != 0:
        sys.exit(dry.stderr[-3000:])

    # one fit job, as its process runs it: the parse of the Snakefile, then the job itself
    job = plan.jobs[len(plan.jobs) // 2]
    os.environ[PLAN_ENV] = str(saved)
    parse_saved, _ = _seconds(plan_for_job, plan.grid.raw)
    run_file, log_file = _seconds(fit_job, plan.grid, plan.snapshot_path, job.key, folder / "a.parquet",
                                  plan.paths.cache)
    del os.environ[PLAN_ENV]
    parse_fresh, _ = _seconds(plan_for_job, plan.grid.raw)
    run_fresh, log_fresh = _seconds(fit_job, plan.grid, plan.snapshot_path, job.key, folder / "b.parquet")
    report = {
        "rows": args.rows, "specifications": len(plan.specs), "fit_jobs": len(plan.jobs),
        "plan_seconds": round(plan_s, 2), "save_plan_seconds": round(save_s, 2),
        "plan_again_unchanged_seconds": round(replan_s, 2),
        "snakemake_start_to_first_job_seconds_dry_run": round(dry_s, 1),
        "one_job": {
            "specs": len(job.specs),
            "parse_with_saved_plan_s": round(parse_saved, 3), "parse_expanding_grid_s": round(parse_fresh, 3),
            "job_with_spec_file_s": round(run_file, 3), "job_expanding_grid_s": round(run_fresh, 3),
            "fit_step_s": log_file.fit_seconds,
            "share_outside_fitting_saved_plan": round(1 - log_file.fit_seconds / (parse_saved + run_file), 3),
            "share_outside_fitting_expanding": round(1 - log_fresh.fit_seconds / (parse_fresh + run_fresh), 3),
        },
    }
    print(json.dumps(report, indent=2))


if __name__ == "__main__":
    main()
