"""Provenance: manifest.json, REPLICATION.md, the environment's lock and a container recipe.

The manifest records what a data editor needs to rerun and check the run: the data file's
SHA-256, the config's hash, the number of specifications, software versions, the platform, seeds,
the git commit of fegrid's checkout (when there is one), wall time and peak memory per stage (from
Snakemake's benchmark files), and the SHA-256 of every output. REPLICATION.md is a section to paste
into a replication package's README, in the order of the Social Science Data Editors' template
README: computational requirements (software, controlled randomness, memory and runtime), then the
list of outputs with the rule that produces each.

``environment-lock.txt`` pins every Python distribution of the environment that ran the grid
(``name==version``), and ``Dockerfile`` is a container recipe generated for the run: the same
Python version, the lock, TeX for the appendix, and the run's command. The config's optional
``replication`` block (data citation, licence, access, availability statement, and a map from
outputs to the paper's exhibits) fills the data and exhibit sections of REPLICATION.md.
"""

from __future__ import annotations

import json
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
           "write_provenance", "environment_lock", "container_recipe", "replication_section", "KEY_PACKAGES"]

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


def _fegrid_source() -> dict[str, Any]:
    """How fegrid itself was installed: from an index (pinnable), a local wheel, or a source folder."""
    try:
        direct = metadata.distribution("fegrid").read_text("direct_url.json")
    except metadata.PackageNotFoundError:
        return {"kind": "source folder", "url": None}
    if not direct:
        return {"kind": "index", "url": None}
    info = json.loads(direct)
    if info.get("dir_info", {}).get("editable") or "dir_info" in info:
        return {"kind": "source folder", "url": info.get("url")}
    return {"kind": "archive", "url": info.get("url")}


def environment_lock() -> str:
    """Every distribution of this Python environment, pinned, sorted by name (pip's requirements format).

    fegrid itself is pinned only when it came from a package index; installed from a source
    checkout or a local wheel, its line is a comment saying so (the container recipe installs it
    from the wheel built from that checkout).
    """
    seen: dict[str, str] = {}
    for dist in metadata.distributions():
        name = dist.metadata["Name"]
        if name:
            seen.setdefault(name.lower().replace("_", "-"), f"{name}=={dist.version}")
    source = _fegrid_source()
    lines = [f"# The Python environment that ran this grid: Python {sys.version.split()[0]} on {platform.platform()}.",
             "# Install with: pip install -r environment-lock.txt"]
    for key in sorted(seen):
        if key == "fegrid" and source["kind"] != "index":
            lines.append(f"# {seen[key]} installed from a {source['kind']} ({source['url'] or 'this checkout'}): "
                         f"install that wheel (pip wheel --no-deps <checkout>)")
        else:
            lines.append(seen[key])
    return "\n".join(lines) + "\n"


def container_recipe(manifest: Mapping[str, Any], *, config_path: str) -> str:
    """A Dockerfile for the run: its Python version, the environment lock, TeX, and the run's command."""
    source = _fegrid_source()
    python = manifest["python"]
    from_index = source["kind"] == "index"
    folder = Path(str(manifest.get("run_folder") or ".")).as_posix()
    fegrid_line = ("" if from_index else
                   f"# fegrid {manifest['fegrid_version']} came from a {source['kind']}: put its wheel beside this "
                   "file first\n# (pip wheel --no-deps -w . <fegrid checkout>)\n"
                   f"COPY fegrid-{manifest['fegrid_version']}-py3-none-any.whl /opt/fegrid/\n"
                   f"RUN pip install --no-cache-dir --no-deps /opt/fegrid/fegrid-{manifest['fegrid_version']}"
                   "-py3-none-any.whl\n")
    return (
        f"# Container recipe for the fegrid run '{manifest['run_name']}', generated by fegrid "
        f"{manifest['fegrid_version']}.\n"
        "# It pins the software that ran the grid: the same Python version and every package of\n"
        "# environment-lock.txt. Build and run it from the replication package's top folder:\n"
        f"#   docker build -t {manifest['run_name']}-replication -f {folder}/Dockerfile .\n"
        f"#   docker run --rm -v \"$PWD\":/replication {manifest['run_name']}-replication\n"
        f"FROM python:{python}-slim-bookworm\n"
        "# TeX for the appendix PDF (booktabs, longtable, graphicx)\n"
        "RUN apt-get update && apt-get install -y --no-install-recommends texlive-latex-base \\\n"
        "    texlive-latex-recommended && rm -rf /var/lib/apt/lists/*\n"
        f"COPY {folder}/environment-lock.txt /opt/fegrid/environment-lock.txt\n"
        "RUN pip install --no-cache-dir -r /opt/fegrid/environment-lock.txt\n"
        f"{fegrid_line}"
        "WORKDIR /replication\n"
        f'CMD ["fegrid", "run", "--config", "{config_path}"]\n'
    )


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
        "fegrid_installed_from": _fegrid_source()["kind"],
        "run_name": config.get("run_name"),
        "run_folder": None if run_folder is None else os.path.relpath(run_folder),
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


_MISSING = "*Not given: set `{key}` in the config's `replication` block.*"


def _data_statement(replication: Mapping[str, Any], manifest: Mapping[str, Any], config_path: str) -> list[str]:
    def field(key: str) -> str:
        value = replication.get(key)
        return str(value).strip() if value else _MISSING.format(key=f"replication.{key}")

    data = manifest["data"]
    return [
        "### Data availability and provenance statements",
        "",
        "#### Statement about rights",
        "",
        "- The authors of the package must have legitimate access to and permission to use the data, and "
        "permission to redistribute it where it is included (see the licence below).",
        "",
        "#### Summary of availability",
        "",
        f"- {field('data_availability')}",
        "",
        "#### Details on each data source",
        "",
        "| item | |",
        "| --- | --- |",
        f"| source | {field('data_source')} |",
        f"| file | `{data['path']}` (SHA-256 `{data['sha256']}`) |",
        f"| citation | {field('data_citation')} |",
        f"| licence | {field('data_licence')} |",
        f"| access | {field('data_access')} |",
        "",
        "### Dataset list",
        "",
        "| data file | source | notes | provided |",
        "| --- | --- | --- | --- |",
        f"| `{data['path']}` | {field('data_source')} | the panel every specification is fitted from (columns "
        f"read: see `{config_path}`) | {'yes' if replication.get('data_provided', True) else 'no'} |",
        "",
    ]


def _exhibit_rows(manifest: Mapping[str, Any], exhibits: Mapping[str, str]) -> list[str]:
    rows = []
    for name, entry in manifest["outputs"].items():
        rule = _RULE_OF.get(name, "draw_curve" if name.startswith("figure") else
                            "draw_adoption" if name.startswith(("event_", "decomposition_")) else "")
        rows.append(f"| {exhibits.get(name, '')} | {name} | `{entry['path']}` | {rule} |")
    rows.sort(key=lambda r: (r.startswith("|  |"), r))  # the paper's exhibits first
    return rows


def replication_section(manifest: Mapping[str, Any], *, config_path: str, draws: int, seed: int | None,
                        replication: Mapping[str, Any] | None = None) -> str:
    """REPLICATION.md: the data editors' template README, each section filled from the run."""
    replication = dict(replication or {})
    stages = manifest["stages"]
    total = sum(s["wall_seconds"] for s in stages.values())
    peak = max((s["max_rss_mb"] for s in stages.values()), default=0.0)
    wall = manifest.get("run_wall_seconds")
    config = shlex.quote(config_path)
    folder = manifest.get("run_folder") or "."
    exhibits = dict(replication.get("exhibits") or {})
    lines = [
        f"## Robustness grid `{manifest['run_name']}` (produced by fegrid {manifest['fegrid_version']})",
        "",
        "### Overview",
        "",
        f"The code in this replication package fits {manifest['specifications']} specifications of a declared grid of "
        f"fixed-effects panel regressions (`{config_path}`) with fegrid, and writes the specification-curve ledger, "
        "summaries, figures, joint tests and a LaTeX appendix. A replicator should expect the run to take about "
        + (f"{wall / 60:.0f} minute(s)" if wall else "the time listed below") + " on a machine like the one below.",
        "",
        *_data_statement(replication, manifest, config_path),
        "### Computational requirements",
        "",
        "#### Software requirements",
        "",
        f"- Python {manifest['python']}, fegrid {manifest['fegrid_version']}"
        + (f" (git commit {manifest['git']['commit'][:12]}"
           + (", with uncommitted changes" if manifest['git']['uncommitted_changes'] else "") + ")"
           if manifest.get("git") else ""),
        *[f"- {name} {version}" for name, version in manifest["packages"].items()],
        f"- every Python package of the environment, pinned: `{folder}/environment-lock.txt` "
        "(`pip install -r` it)",
        f"- a container recipe pinned to that lock: `{folder}/Dockerfile`",
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
        "### Description of programs/code",
        "",
        f"- `{config_path}` declares the whole grid (outcomes, focal regressors, absorbed effects, clustering, "
        "samples, controls, weights, exclusions, baseline); nothing else is chosen by hand.",
        "- fegrid's Snakemake workflow runs, in order: `snapshot_data` (the columns read, hashed), `fit_job` "
        "(every specification), `gather_ledger`, `summarise_curve`, `draw_curve`, `draw_adoption` (staggered "
        "designs), `draw_null_curves` and "
        "`test_curve` (joint tests), `render_appendix` and `compile_appendix`, then `write_provenance` "
        "(this file, the manifest, the lock and the container recipe).",
        "",
        "### Instructions to replicators",
        "",
        *_data_lines(manifest),
        f"- Run `fegrid run --config {config}` (or `snakemake -c N --configfile {config}`), or in the container: "
        f"`docker build -t {manifest['run_name']}-replication -f {folder}/Dockerfile .` then "
        f"`docker run --rm -v \"$PWD\":/replication {manifest['run_name']}-replication`.",
        f"- Compare the new ledger with this one: `fegrid compare {folder}/ledger.csv <new run>/ledger.csv`.",
        "",
        "### List of tables and programs",
        "",
        "| exhibit | output | file | produced by rule |",
        "| --- | --- | --- | --- |",
        *_exhibit_rows(manifest, exhibits),
        "",
        "### References",
        "",
        f"- {replication.get('data_citation') or _MISSING.format(key='replication.data_citation')}",
        "- Simonsohn, U., Simmons, J. P. and Nelson, L. D. (2020). Specification curve analysis. "
        "*Nature Human Behaviour* 4, 1208-1214.",
        "",
    ]
    return "\n".join(lines)


def write_provenance(manifest: Mapping[str, Any], files: Mapping[str, str | Path], *, config_path: str,
                     draws: int, seed: int | None, replication: Mapping[str, Any] | None = None) -> None:
    """Write the provenance files named in ``files`` (see :meth:`fegrid.store.RunPaths.provenance_files`)."""
    write_text(files["environment_lock"], environment_lock())
    write_text(files["container"], container_recipe(manifest, config_path=config_path))
    write_json(files["manifest"], manifest)
    write_text(files["replication"], replication_section(manifest, config_path=config_path, draws=draws, seed=seed,
                                                         replication=replication))
