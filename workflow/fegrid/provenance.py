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

import os
import platform
import shlex
import subprocess
import sys
from collections.abc import Mapping, Sequence
from importlib import metadata
from pathlib import Path
from typing import Any

import pandas as pd

from . import __version__, keys
from .data import file_sha256
from .store import write_json, write_text

__all__ = ["config_hash", "package_versions", "git_commit", "stage_costs", "build_manifest",
           "write_provenance", "KEY_PACKAGES"]

KEY_PACKAGES = ("numpy", "scipy", "pandas", "pyarrow", "matplotlib", "snakemake", "jsonschema", "PyYAML",
                "tabulate")


def config_hash(config: Mapping[str, Any]) -> str:
    """SHA-256 of the config's canonical JSON (key order and YAML formatting do not matter)."""
    return keys.config_digest(config)


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


def _data_record(data_path: str | Path, fitted_sha256: str | None) -> dict[str, Any]:
    """What was fitted (the snapshot's hash) and whether the file on disk still holds it."""
    path = Path(data_path)
    on_disk = file_sha256(path) if path.is_file() else None
    record: dict[str, Any] = {"path": str(data_path), "sha256": fitted_sha256 or on_disk}
    if fitted_sha256 is not None:
        record["file_on_disk_sha256"] = on_disk
        record["file_on_disk_matches"] = on_disk == fitted_sha256
    return record


def _output_record(path: str | Path, run_folder: str | Path | None) -> dict[str, str]:
    record = {"path": str(path), "sha256": file_sha256(path)}
    if run_folder is not None:  # where the file sits in the run folder: what a round copies
        record["file"] = Path(os.path.relpath(Path(path).resolve(), Path(run_folder).resolve())).as_posix()
    return record


def build_manifest(*, config: Mapping[str, Any], data_path: str | Path, n_specs: int, seeds: Mapping[str, Any],
                   outputs: Mapping[str, str | Path], benchmarks: Sequence[str | Path],
                   workflow_root: str | Path | None, fitted_data_sha256: str | None = None,
                   config_path: str | Path | None = None, run_wall_seconds: float | None = None,
                   run_folder: str | Path | None = None) -> dict[str, Any]:
    """The manifest of a run (see the module docstring).

    ``data.sha256`` is the hash of the bytes the estimates were fitted from (recorded in the data
    snapshot, ``fitted_data_sha256``); when the file on disk no longer holds them,
    ``data.file_on_disk_matches`` is false. ``config_sha256`` hashes the config as JSON with sorted
    keys after the schema's defaults are filled in (so formatting and key order do not count);
    ``config_file.sha256`` hashes the file's own bytes.
    """
    config_file = None
    if config_path is not None and Path(config_path).is_file():
        config_file = {"path": str(config_path), "sha256": file_sha256(config_path)}
    return {
        "fegrid_version": __version__,
        "run_name": config.get("run_name"),
        "data": _data_record(data_path, fitted_data_sha256),
        "config_sha256": config_hash(config),
        "config_sha256_means": "SHA-256 of the config as JSON with sorted keys, after the schema's defaults "
                               "are filled in",
        "config_file": config_file,
        "specifications": n_specs,
        "seeds": dict(seeds),
        "run_wall_seconds": None if run_wall_seconds is None else round(run_wall_seconds, 1),
        "python": sys.version.split()[0],
        "packages": package_versions(),
        "platform": {"system": platform.platform(), "machine": platform.machine(), "cpus": os.cpu_count()},
        "git": git_commit(workflow_root) if workflow_root is not None else None,
        "stages": stage_costs(benchmarks),
        "outputs": {name: _output_record(p, run_folder) for name, p in sorted(outputs.items()) if Path(p).is_file()},
    }


_RULE_OF = {
    "ledger_csv": "gather_ledger", "ledger_parquet": "gather_ledger", "summary_csv": "summarise_curve",
    "summary_md": "summarise_curve", "summary_tex": "summarise_curve", "choices_csv": "summarise_curve",
    "influence_csv": "summarise_curve",
    "joint_csv": "test_curve", "joint_md": "test_curve", "appendix_tex": "render_appendix",
    "appendix_pdf": "compile_appendix",
}


def _randomness(manifest: Mapping[str, Any], config_path: str, draws: int) -> list[str]:
    seeds = {k: v for k, v in (manifest.get("seeds") or {}).items() if v is not None}
    lines = []
    joint = seeds.pop("joint_inference.seed", None)
    if draws and joint is not None:
        lines.append(f"- The joint tests draw {draws} bootstrap samples; the random seed is set in `{config_path}`, "
                     f"key `joint_inference.seed` (value {joint}). Draw *d* uses the generator seeded with (seed, "
                     "*d*), so the results do not depend on the number of parallel jobs.")
    for key, value in sorted(seeds.items()):
        lines.append(f"- The wild cluster bootstrap of key `{key}` (value {value}) in `{config_path}`: each "
                     "specification's draws use the generator seeded with (seed, a number from its spec id), so "
                     "they do not depend on which job fits it.")
    if not lines:
        lines.append("- No random numbers are used (no joint tests or wild bootstrap were requested).")
    return lines


def _data_lines(manifest: Mapping[str, Any]) -> list[str]:
    data = manifest["data"]
    lines = [f"- Check the data: `sha256sum {shlex.quote(data['path'])}` must print `{data['sha256']}` (the bytes "
             "the estimates were fitted from)."]
    if data.get("file_on_disk_matches") is False:
        lines.append(f"- **Caution:** when these files were written, the file at that path held other bytes "
                     f"(SHA-256 `{data.get('file_on_disk_sha256')}`): it changed after the estimates were fitted. "
                     "Restore the data above, or run again to fit the file as it is now.")
    return lines


def replication_section(manifest: Mapping[str, Any], *, config_path: str, draws: int, seed: int | None) -> str:
    stages = manifest["stages"]
    total = sum(s["wall_seconds"] for s in stages.values())
    peak = max((s["max_rss_mb"] for s in stages.values()), default=0.0)
    wall = manifest.get("run_wall_seconds")
    config = shlex.quote(config_path)
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
        *_randomness(manifest, config_path, draws),
        "- All estimates are deterministic: the same data and config give a byte-identical ledger.",
        "",
        "#### Memory and runtime requirements",
        "",
        f"- Measured on: {manifest['platform']['system']}, {manifest['platform']['cpus']} CPUs.",
        (f"- Wall time of the run: {wall:.1f} s. " if wall is not None else "- ")
        + f"Wall time of the jobs added up (as if run one at a time): {total:.1f} s; largest peak memory of a "
        f"job: {peak:.0f} MB.",
        "",
        "| stage (Snakemake rule) | jobs | wall time (s) | peak memory (MB) |",
        "| --- | ---: | ---: | ---: |",
        *[f"| {rule} | {c['jobs']} | {c['wall_seconds']:.1f} | {c['max_rss_mb']:.0f} |"
          for rule, c in sorted(stages.items())],
        "",
        "### Instructions to replicators",
        "",
        *_data_lines(manifest),
        f"- Run `fegrid run --config {config}` (or `snakemake -c N --configfile {config}`).",
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
