"""Benchmark: reading a wide data file through fegrid against reading only its needed columns.

Data (seeded, synthetic, invented): 200,000 rows x 202 columns (unit, time and 200 numeric
columns); the grid uses 6 of them. Each format is written once; then, each in a fresh process so
that peak memory is its own:

* fegrid: the grid's reader (`pipeline._read_grid_table`, what the snapshot parses), and the same
  followed by the data checks (`pipeline.load_checked`: duplicate keys, missing values, ...);
* floor: the format's own reader asked for the 6 columns only (pandas / pyarrow);
* whole: the whole file read, then subset (what fegrid did before version 0.2).

Printed, from one run: seconds and peak RSS of each, and fegrid / floor (target: under 2x).

    python tests/benchmarks/bench_reading.py [--rows 200000] [--formats parquet,feather,dta,csv]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

NEEDED = ["unit", "time", "y", "x", "c1", "c2"]


def make_in_child(rows: int, folder: Path, formats: list[str]) -> dict[str, Path]:
    """Write the files from another process, so this one stays small (a child's peak RSS starts
    from its parent's RSS when it is started)."""
    code = (f"import sys; sys.path.insert(0, {str(Path(__file__).parent)!r}); from bench_reading import make; "
            f"from pathlib import Path; make({rows}, Path({str(folder)!r}), {formats!r})")
    subprocess.run([sys.executable, "-c", code], check=True)
    return {fmt: folder / f"wide.{fmt}" for fmt in formats}


def make(rows: int, folder: Path, formats: list[str]) -> dict[str, Path]:
    rng = np.random.default_rng(11)
    units = rows // 20
    frame = pd.DataFrame({"unit": np.repeat(np.arange(units), 20), "time": np.tile(np.arange(20), units)})
    numeric = {f"v{i}": rng.standard_normal(rows) for i in range(196)}
    numeric.update({"y": rng.standard_normal(rows), "x": rng.standard_normal(rows), "c1": rng.standard_normal(rows),
                    "c2": rng.standard_normal(rows)})
    frame = pd.concat([frame, pd.DataFrame(numeric)], axis=1)
    paths = {}
    for fmt in formats:
        path = folder / f"wide.{fmt}"
        if fmt == "parquet":
            frame.to_parquet(path, index=False)
        elif fmt == "feather":
            frame.to_feather(path)
        elif fmt == "dta":
            frame.to_stata(path, write_index=False)
        else:
            frame.to_csv(path, index=False)
        paths[fmt] = path
    return paths


CHILD = r"""
import json, resource, sys, time
import pandas as pd
mode, path = sys.argv[1], sys.argv[2]
needed = ["unit", "time", "y", "x", "c1", "c2"]
started = time.perf_counter()
if mode in ("fegrid", "fegrid_checked"):
    from fegrid.grid import load_config
    from fegrid.pipeline import _read_grid_table, load_checked
    grid = load_config({"run_name": "wide", "data": {"path": path, "unit": "unit", "time": "time"},
                        "outcomes": ["y"], "focal_regressors": ["x"],
                        "control_sets": {"named": {"both": ["c1", "c2"]}}})
    started = time.perf_counter()  # the config's loading is not reading
    frame = load_checked(grid) if mode == "fegrid_checked" else _read_grid_table(grid, grid.columns())
elif mode == "floor":
    if path.endswith(".parquet"):
        frame = pd.read_parquet(path, columns=needed)
    elif path.endswith(".feather"):
        import pyarrow.feather
        frame = pyarrow.feather.read_table(path, columns=needed).to_pandas()
    elif path.endswith(".dta"):
        frame = pd.read_stata(path, columns=needed)
    else:
        frame = pd.read_csv(path, usecols=needed)
else:
    reader = {"parquet": pd.read_parquet, "feather": pd.read_feather, "dta": pd.read_stata,
              "csv": pd.read_csv}[path.rsplit(".", 1)[1]]
    frame = reader(path)[needed]
seconds = time.perf_counter() - started
print(json.dumps({"seconds": seconds, "rows": len(frame),
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def run(mode: str, path: Path) -> dict:
    out = subprocess.run([sys.executable, "-c", CHILD, mode, str(path)], capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rows", type=int, default=200_000)
    parser.add_argument("--formats", default="parquet,feather,dta,csv")
    args = parser.parse_args()
    formats = args.formats.split(",")
    with tempfile.TemporaryDirectory() as tmp:
        paths = make_in_child(args.rows, Path(tmp), formats)
        print(f"{args.rows:,} rows x 202 columns, 6 needed; one run each, each in its own process")
        print(f"{'format':8} {'fegrid s':>9} {'+checks s':>9} {'floor s':>8} {'whole s':>8} {'ratio':>6} "
              f"{'fegrid MB':>10} {'floor MB':>9} {'whole MB':>9}  (ratio = fegrid / floor; target < 2)")
        for fmt, path in paths.items():
            ours, checked = run("fegrid", path), run("fegrid_checked", path)
            floor, whole = run("floor", path), run("whole", path)
            assert ours["rows"] == floor["rows"] == whole["rows"] == args.rows
            print(f"{fmt:8} {ours['seconds']:9.3f} {checked['seconds']:9.3f} {floor['seconds']:8.3f} "
                  f"{whole['seconds']:8.3f} {ours['seconds'] / floor['seconds']:6.2f} {ours['peak_mb']:10.0f} "
                  f"{floor['peak_mb']:9.0f} {whole['peak_mb']:9.0f}")


if __name__ == "__main__":
    main()
