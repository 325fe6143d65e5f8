"""Provenance: manifest.json and REPLICATION.md for a run.

The manifest records what a data editor needs to rerun and check the run: the data file's
SHA-256, the config's hash, the number of specifications, software versions, the platform, seeds,
the git commit of fegrid's checkout (when there is one), wall time and peak memory per stage (from
Snakemake's benchmark files), and the SHA-256 of every output. REPLICATION.md is a section to paste
into a replication package's README, in the order of the Social Science Data Editors' template
README: computational requirements (software, controlled randomness, memory and runtime), then the
list of outputs with the rule that produces each.
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
import subprocess
import sys
from collections.abc import Mapping, Sequence
from importlib import metadata
from pathlib import Path
from typing import Any

import pandas as pd

from . import __version__
from .data import file_sha256
from .store import write_json, write_text

__all__ = ["config_hash", "package_versions", "git_commit", "stage_costs", "build_manifest",
           "write_provenance", "KEY_PACKAGES"]

KEY_PACKAGES = ("numpy", "scipy", "pandas", "pyarrow", "matplotlib", "snakemake", "jsonschema", "PyYAML",
                "tabulate")


def config_hash(config: Mapping[str, Any]) -> str:
    """SHA-256 of the config's canonical JSON (key order and YAML formatting do not matter)."""
    return hashlib.sha256(json.dumps(config, sort_keys=True, default=str).encode()).hexdigest()


def package_versions() -> dict[str, str]:
    out = {}
    for name in KEY_PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def git_commit(folder: str | Path) -> dict[str, Any] | None:
    """Commit of the git checkout holding ``folder`` and whether it has uncommitted changes."""
    try:
        head = subprocess.run(["git", "rev-parse", "HEAD"], cwd=folder, capture_output=True, text=True, check=True)
        dirty = subprocess.run(["git", "status", "--porcelain"], cwd=folder, capture_output=True, text=True,
                               check=True)
    except (OSError, subprocess.CalledProcessError):
        return None
    return {"commit": head.stdout.strip(), "uncommitted_changes": bool(dirty.stdout.strip())}


def stage_costs(benchmarks: Sequence[str | Path]) -> dict[str, dict[str, float]]:
    """Wall time (summed) and peak memory (max) per rule, from Snakemake benchmark files.

    Files are named ``benchmarks/<rule>/<anything>.tsv``; missing files are skipped (a stage
    whose outputs were already up to date keeps the figures of the run that produced them).
    """
    costs: dict[str, dict[str, float]] = {}
    for path in map(Path, benchmarks):
        if not path.is_file():
            continue
        table = pd.read_csv(path, sep="\t")
        rule = path.parent.name
        entry = costs.setdefault(rule, {"jobs": 0, "wall_seconds": 0.0, "max_rss_mb": 0.0})
        entry["jobs"] += 1
        entry["wall_seconds"] = round(entry["wall_seconds"] + float(table["s"].iloc[0]), 3)
        rss = pd.to_numeric(table.get("max_rss", pd.Series([0])), errors="coerce").fillna(0).iloc[0]
        entry["max_rss_mb"] = round(max(entry["max_rss_mb"], float(rss)), 1)
    return costs


def build_manifest(*, config: Mapping[str, Any], data_path: str | Path, n_specs: int, seeds: Mapping[str, Any],
                   outputs: Mapping[str, str | Path], benchmarks: Sequence[str | Path],
                   workflow_root: str | Path) -> dict[str, Any]:
    return {
        "fegrid_version": __version__,
        "run_name": config.get("run_name"),
        "data": {"path": str(data_path), "sha256": file_sha256(data_path)},
        "config_sha256": config_hash(config),
        "specifications": n_specs,
        "seeds": dict(seeds),
        "python": sys.version.split()[0],
        "packages": package_versions(),
        "platform": {"system": platform.platform(), "machine": platform.machine(), "cpus": os.cpu_count()},
        "git": git_commit(workflow_root),
        "stages": stage_costs(benchmarks),
        "outputs": {name: {"path": str(p), "sha256": file_sha256(p)} for name, p in sorted(outputs.items())
                    if Path(p).is_file()},
    }


_RULE_OF = {
    "ledger_csv": "gather_ledger", "ledger_parquet": "gather_ledger", "summary_csv": "summarise_curve",
    "summary_md": "summarise_curve", "summary_tex": "summarise_curve", "choices_csv": "summarise_curve",
    "influence_csv": "summarise_curve",
    "joint_csv": "test_curve", "joint_md": "test_curve", "appendix_tex": "render_appendix",
    "appendix_pdf": "compile_appendix",
}


def replication_section(manifest: Mapping[str, Any], *, config_path: str, draws: int, seed: int | None) -> str:
    stages = manifest["stages"]
    total = sum(s["wall_seconds"] for s in stages.values())
    peak = max((s["max_rss_mb"] for s in stages.values()), default=0.0)
    lines = [
        f"## Robustness grid `{manifest['run_name']}` (produced by fegrid {manifest['fegrid_version']})",
        "",
        "### Computational requirements",
        "",
        "#### Software requirements",
        "",
        f"- Python {manifest['python']}, fegrid {manifest['fegrid_version']}"
        + (f" (git commit {manifest['git']['commit'][:12]}"
           + (", with uncommitted changes" if manifest['git']['uncommitted_changes'] else "") + ")"
           if manifest.get("git") else ""),
        *[f"- {name} {version}" for name, version in manifest["packages"].items()],
        "- a LaTeX distribution with pdflatex, booktabs and longtable, for the appendix PDF",
        "",
        "#### Controlled randomness",
        "",
        (f"- The joint tests draw {draws} bootstrap samples; the random seed is set in `{config_path}`, key "
         f"`joint_inference.seed` (value {seed}). Draw *d* uses the generator seeded with (seed, *d*), so the "
         "results do not depend on the number of parallel jobs."
         if draws else "- No random numbers are used (no joint tests were requested)."),
        "- All estimates are deterministic: the same data and config give a byte-identical ledger.",
        "",
        "#### Memory and runtime requirements",
        "",
        f"- Measured on: {manifest['platform']['system']}, {manifest['platform']['cpus']} CPUs.",
        f"- Total wall time of the stages: {total:.1f} s; largest peak memory of a job: {peak:.0f} MB.",
        "",
        "| stage (Snakemake rule) | jobs | wall time (s) | peak memory (MB) |",
        "| --- | ---: | ---: | ---: |",
        *[f"| {rule} | {c['jobs']} | {c['wall_seconds']:.1f} | {c['max_rss_mb']:.0f} |"
          for rule, c in sorted(stages.items())],
        "",
        "### Instructions to replicators",
        "",
        f"- Check the data: `sha256sum {manifest['data']['path']}` must print `{manifest['data']['sha256']}`.",
        f"- Run `fegrid run --config {config_path}` (or `snakemake -c N --configfile {config_path}`).",
        "",
        "### List of outputs",
        "",
        "| output | file | produced by rule |",
        "| --- | --- | --- |",
        *[f"| {name} | `{entry['path']}` | {_RULE_OF.get(name, 'draw_curve' if name.startswith('figure') else '')} |"
          for name, entry in manifest["outputs"].items()],
        "",
    ]
    return "\n".join(lines)


def write_provenance(manifest: Mapping[str, Any], manifest_path: str | Path, replication_path: str | Path, *,
                     config_path: str, draws: int, seed: int | None) -> None:
    write_json(manifest_path, manifest)
    write_text(replication_path, replication_section(manifest, config_path=config_path, draws=draws, seed=seed))
