"""Provenance: the snapshot records what was fitted, and the manifest describes exactly that.

Data: statsmodels' Grunfeld investment data (see conftest.py).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import pandas as pd
import pytest
from helpers import fit_in_process, wage_grid

from fegrid.data import file_sha256
from fegrid.errors import DataError
from fegrid.grid import load_config
from fegrid.pipeline import fit_grid, make_plan, provenance, snapshot_data, snapshot_sha256
from fegrid.pipeline import test_curve as joint_test_step


def test_data_replaced_after_planning_is_refused_and_nothing_written(tiny_project: Path, monkeypatch) -> None:
    """The snapshot is named by the hash the run was planned with: if the file changed since, the
    snapshot would hold other bytes than its name says (and poison the cache)."""
    monkeypatch.chdir(tiny_project)
    plan = make_plan("grid.yaml")
    data = pd.read_csv("grunfeld.csv")
    data.loc[3, "invest"] += 1.0
    data.to_csv("grunfeld.csv", index=False)
    with pytest.raises(DataError, match="changed after this run was planned"):
        snapshot_data(plan.grid, plan.snapshot_path, plan.data_sha256)
    assert not plan.snapshot_path.exists()
    # planned again, the new bytes get their own snapshot, which records their hash
    plan = make_plan("grid.yaml")
    snapshot_data(plan.grid, plan.snapshot_path, plan.data_sha256)
    assert snapshot_sha256(plan.snapshot_path) == file_sha256("grunfeld.csv") == plan.data_sha256


def _provenance(plan, tmp: Path, config_path: str = "grid.yaml") -> dict:
    outputs = {name: str(path) for name, path in plan.report_outputs(build_pdf=False).items() if path.is_file()}
    provenance(plan.grid, plan.grid.raw, config_path, outputs, [], plan.paths.provenance_files(), len(plan.specs),
               plan.snapshot_path)
    return json.loads(plan.paths.file("manifest.json").read_text())


def test_manifest_describes_the_snapshot_that_was_fitted(tiny_project: Path, monkeypatch) -> None:
    monkeypatch.chdir(tiny_project)
    plan, _ = fit_grid("grid.yaml")
    fitted = file_sha256("grunfeld.csv")
    man = _provenance(plan, tiny_project)
    assert man["data"]["sha256"] == fitted and man["data"]["file_on_disk_matches"] is True
    # the file changes after the fit: the manifest still names the bytes that were fitted, and says so
    data = pd.read_csv("grunfeld.csv")
    data.loc[0, "invest"] *= 2
    data.to_csv("grunfeld.csv", index=False)
    man = _provenance(plan, tiny_project)
    assert man["data"]["sha256"] == fitted
    assert man["data"]["file_on_disk_matches"] is False and man["data"]["file_on_disk_sha256"] != fitted
    text = plan.paths.file("REPLICATION.md").read_text()
    assert f"must print `{fitted}`" in text and "**Caution:**" in text


def test_manifest_records_config_file_every_seed_and_quotes_paths(tiny_project: Path, monkeypatch) -> None:
    monkeypatch.chdir(tiny_project)
    raw = (tiny_project / "grid.yaml").read_text().replace(
        "firm: {kind: clustered, by: firm}",
        "firm: {kind: clustered, by: firm, wild_bootstrap: {draws: 99, weights: webb, seed: 77}}")
    (tiny_project / "my grid.yaml").write_text(raw)
    plan, _ = fit_grid("my grid.yaml")
    man = _provenance(plan, tiny_project, config_path="my grid.yaml")
    assert man["config_file"] == {"path": "my grid.yaml", "sha256": file_sha256("my grid.yaml")}
    assert "defaults" in man["config_sha256_means"]
    assert man["seeds"] == {"joint_inference.seed": 7, "clustering.firm.wild_bootstrap.seed": 77}
    text = plan.paths.file("REPLICATION.md").read_text()
    assert "fegrid run --config 'my grid.yaml'" in text
    assert "`clustering.firm.wild_bootstrap.seed` (value 77)" in text
    assert "`joint_inference.seed` (value 7)" in text
    # every output is listed with its place in the run folder, which is what a round copies
    assert man["outputs"]["ledger_csv"]["file"] == "ledger.csv"


def test_run_wall_time_is_the_runs_own(tiny_project: Path, monkeypatch) -> None:
    import time

    monkeypatch.chdir(tiny_project)
    plan, _ = fit_grid("grid.yaml")
    monkeypatch.setenv("FEGRID_RUN_STARTED", repr(time.time() - 12.5))
    man = _provenance(plan, tiny_project)
    assert 12.5 <= man["run_wall_seconds"] < 60
    assert "Wall time of the run: " in plan.paths.file("REPLICATION.md").read_text()


def test_joint_p_value_of_zero_reads_as_a_bound(tiny_project: Path, monkeypatch) -> None:
    monkeypatch.chdir(tiny_project)
    plan, ledger = fit_grid("grid.yaml")
    led = plan.paths.ledger_parquet
    draws = pd.DataFrame([{"draw": d, "spec_id": s, "estimate": 0.0, "std_error": 1.0, "df_inference": 10.0}
                          for d in range(20) for s in ledger.loc[ledger["status"] == "ok", "spec_id"]])
    draws_file = tiny_project / "draws.parquet"
    draws.to_parquet(draws_file)
    table = joint_test_step(load_config("grid.yaml"), led, [draws_file], tiny_project / "j.csv", tiny_project / "j.md")
    zero = table[table["p_value"] == 0]
    assert len(zero) and (zero["p_value_text"] == "< 0.05").all()
    md = (tiny_project / "j.md").read_text()
    assert "< 0.05" in md and "| 0 " not in md
    assert os.path.getsize(tiny_project / "j.csv") > 0



@pytest.fixture(scope="module")
def wage_ledger(tmp_path_factory, wage_panel) -> pd.DataFrame:
    folder = tmp_path_factory.mktemp("wage")
    return fit_in_process(wage_grid(folder, wage_panel), folder)


def test_manifest_and_replication(wage_ledger, tmp_path: Path, wage_panel) -> None:
    from fegrid.provenance import build_manifest, replication_section

    raw = wage_grid(tmp_path, wage_panel)
    out = tmp_path / "ledger.csv"
    wage_ledger.to_csv(out, index=False)
    bench = tmp_path / "benchmarks" / "fit_job" / "abc.tsv"
    bench.parent.mkdir(parents=True)
    bench.write_text("s\th:m:s\tmax_rss\n1.5\t0:00:01\t120.0\n")
    man = build_manifest(config=raw, data_path=raw["data"]["path"], n_specs=len(wage_ledger),
                         seeds={"joint_inference.seed": 5}, outputs={"ledger_csv": out}, benchmarks=[bench],
                         workflow_root=tmp_path)
    import hashlib

    assert man["data"]["sha256"] == hashlib.sha256(Path(raw["data"]["path"]).read_bytes()).hexdigest()
    assert man["stages"]["fit_job"] == {"jobs": 1, "wall_seconds": 1.5, "max_rss_mb": 120.0}
    assert man["outputs"]["ledger_csv"]["sha256"] == hashlib.sha256(out.read_bytes()).hexdigest()
    assert set(man["packages"]) >= {"numpy", "pandas", "snakemake"}
    bare = replication_section(man, config_path="grid.yaml", draws=500, seed=5)
    # without a replication block, each data field says which key to set
    assert "set `replication.data_citation`" in bare and "set `replication.data_licence`" in bare
    replication = {"data_source": "linearmodels' wage_panel", "data_citation": "Vella and Verbeek (1998)",
                   "data_licence": "as shipped by linearmodels (NCSA)", "data_access": "pip install linearmodels",
                   "data_availability": "All data are publicly available.", "exhibits": {"ledger_csv": "Table A2"}}
    text = replication_section(man, config_path="grid.yaml", draws=500, seed=5, replication=replication)
    # every section of the Social Science Data Editors' template README, in its order
    headings = ["### Overview", "### Data availability and provenance statements", "#### Statement about rights",
                "#### Summary of availability", "#### Details on each data source", "### Dataset list",
                "### Computational requirements", "#### Software requirements", "#### Controlled randomness",
                "#### Memory and runtime requirements", "### Description of programs/code",
                "### Instructions to replicators", "### List of tables and programs", "### References"]
    positions = [text.index(h) for h in headings]
    assert positions == sorted(positions)
    assert "`joint_inference.seed` (value 5)" in text and "Not given" not in text
    assert "| Table A2 | ledger_csv | " in text and "Vella and Verbeek (1998)" in text
    assert "environment-lock.txt" in text and "Dockerfile" in text
    json.dumps(man)


def test_environment_lock_and_container_recipe(tiny_project: Path, monkeypatch) -> None:
    """The lock pins every distribution of this environment (checked against importlib.metadata) and
    the container recipe uses this Python version, that lock and the run's command."""
    from importlib import metadata

    monkeypatch.chdir(tiny_project)
    plan, _ = fit_grid("grid.yaml")
    man = _provenance(plan, tiny_project)
    lock = plan.paths.environment_lock.read_text().splitlines()
    pins = {line.split("==")[0].lower() for line in lock if "==" in line and not line.startswith("#")}
    for name in ("numpy", "pandas", "snakemake", "pyarrow", "jsonschema"):
        assert f"{metadata.distribution(name).metadata['Name']}=={metadata.version(name)}" in lock
    assert "fegrid" not in pins  # installed from this checkout: a comment says how to build its wheel
    assert any(line.startswith("# fegrid==") for line in lock)
    recipe = plan.paths.container.read_text()
    assert f"FROM python:{man['python']}-slim-bookworm" in recipe
    assert "environment-lock.txt /opt/fegrid/environment-lock.txt" in recipe
    assert 'CMD ["fegrid", "run", "--config", "grid.yaml"]' in recipe
    assert f"fegrid-{man['fegrid_version']}-py3-none-any.whl" in recipe


def test_exhibits_must_name_outputs_of_the_grid(tiny_project: Path, monkeypatch) -> None:
    import yaml

    from fegrid.errors import ConfigError

    monkeypatch.chdir(tiny_project)
    raw = yaml.safe_load((tiny_project / "grid.yaml").read_text())
    raw["replication"] = {"exhibits": {"ledger_csv": "Table 2", "figure_of_nothing_pdf": "Figure 9"}}
    with pytest.raises(ConfigError, match="figure_of_nothing_pdf"):
        make_plan(raw)
