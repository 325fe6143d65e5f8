"""The repository's own promises: CI runs the README's test command; the code passes ruff."""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from fegrid.ledger import LEDGER_COLUMNS

ROOT = Path(__file__).resolve().parents[1]


def _readme_commands() -> list[str]:
    text = (ROOT / "README.md").read_text()
    blocks = text.split("```bash\n")[1:3]
    return [b.split("```")[0].strip() for b in blocks]


def test_ci_runs_the_readme_test_command() -> None:
    demo, tests = _readme_commands()
    assert "fegrid demo" in demo
    ci = (ROOT / ".ci/run").read_text().splitlines()
    assert tests in ci and tests.endswith('-m "not slow"')  # the fast tier...
    assert ci.index(tests) < ci.index(".venv/bin/python -m pytest -m slow")  # ...then the slow tier


def test_readme_opens_with_one_paragraph_then_two_commands() -> None:
    text = (ROOT / "README.md").read_text()
    head = text.split("```bash")[0]
    paragraphs = [p for p in head.split("\n\n") if p.strip() and not p.startswith("#")]
    assert len(paragraphs) == 2  # the job, then the line introducing the first command
    assert len(_readme_commands()) == 2


def test_ruff_is_clean() -> None:
    ruff = shutil.which("ruff", path=str(Path(sys.executable).parent)) or shutil.which("ruff")
    if ruff is None:
        pytest.skip("ruff is not installed")
    proc = subprocess.run([ruff, "check", "workflow", "tests"], cwd=ROOT, capture_output=True, text=True)
    assert proc.returncode == 0, proc.stdout[-3000:]


def _imports(module: Path) -> set[str]:
    """fegrid modules imported by one module of the package (relative or absolute imports)."""
    import ast

    names = set()
    for node in ast.walk(ast.parse(module.read_text())):
        if isinstance(node, ast.ImportFrom):
            if node.level == 1 and node.module:
                names.add(node.module.split(".")[0])
            elif node.level == 1:
                names.update(a.name for a in node.names)
            elif node.module and node.module.startswith("fegrid."):
                names.add(node.module.split(".")[1])
        elif isinstance(node, ast.Import):
            names.update(a.name.split(".")[1] for a in node.names if a.name.startswith("fegrid."))
    return names - {"__init__"}


def test_the_package_import_graph_has_no_cycle() -> None:
    package = ROOT / "workflow" / "fegrid"
    modules = {p.stem for p in package.glob("*.py")} - {"__init__"}
    graph = {m: _imports(package / f"{m}.py") & modules for m in modules}
    state: dict[str, int] = {}

    def visit(node: str, path: list[str]) -> None:
        state[node] = 1
        for nxt in sorted(graph[node]):
            assert state.get(nxt) != 1, f"import cycle: {' -> '.join(path + [node, nxt])}"
            if nxt not in state:
                visit(nxt, path + [node])
        state[node] = 2

    for module in sorted(modules):
        if module not in state:
            visit(module, [])
    # leaves stay leaves: the keys and the locations know nothing of the rest
    assert graph["keys"] == set() and graph["locations"] == set()


@pytest.mark.parametrize("which", ["workflow", "checkout root"])
def test_every_rule_is_a_known_stage(tiny_project: Path, fegrid_env, which: str) -> None:
    """Benchmarks and logs are named from pipeline.STAGES: a rule outside it would be missing from
    the manifest's stages, so the rule list and the stage list must agree. The checkout's root
    Snakefile (the demo's) includes the workflow's and holds the same rules."""
    from fegrid.locations import SNAKEFILE
    from fegrid.pipeline import RULES

    snakefile = SNAKEFILE if which == "workflow" else Path(__file__).resolve().parents[1] / "Snakefile"
    proc = subprocess.run([sys.executable, "-m", "snakemake", "--snakefile", str(snakefile), "--configfile",
                           "grid.yaml", "--list-rules"], cwd=tiny_project, capture_output=True, text=True,
                          env=fegrid_env)
    assert proc.returncode == 0, proc.stderr[-2000:]
    rules = {line.strip() for line in proc.stdout.splitlines() if line.strip()}
    assert rules == set(RULES) | {"all"}
    # the default target is the whole run (an included file's would not carry over to the root's)
    dry = subprocess.run([sys.executable, "-m", "snakemake", "--snakefile", str(snakefile), "--configfile",
                          "grid.yaml", "-n", "-c", "1"], cwd=tiny_project, capture_output=True, text=True,
                         env=fegrid_env)
    assert dry.returncode == 0, dry.stderr[-2000:]
    jobs = dry.stdout + dry.stderr
    assert "write_provenance" in jobs and "\nall " in jobs, jobs[-2000:]


def test_ledger_columns_documented_in_readme() -> None:
    readme = (ROOT / "README.md").read_text()
    for col in LEDGER_COLUMNS:
        assert f"`{col}`" in readme, col


def test_no_module_imports_a_posix_only_module_at_top_level() -> None:
    """fegrid must import on Windows: POSIX-only modules are imported inside functions, with a
    fallback (see fegrid.lock), never at a module's top level."""
    import ast

    posix_only = {"fcntl", "pwd", "grp", "resource", "termios", "tty", "pty", "posix"}
    for module in sorted((ROOT / "workflow" / "fegrid").glob("*.py")):
        for node in ast.parse(module.read_text()).body:
            names = ([a.name for a in node.names] if isinstance(node, ast.Import)
                     else [node.module or ""] if isinstance(node, ast.ImportFrom) else [])
            assert not {n.split(".")[0] for n in names} & posix_only, (module.name, names)


def test_starting_fegrid_or_its_workflow_does_not_import_scipy() -> None:
    """Every command and the workflow's parse (``rules/common.smk``) import the CLI and the planning
    modules; SciPy is for computing and loads when first used (fegrid.lazy), which took 0.2 s off each
    start. A fresh interpreter, so that no other test's import counts; then one use loads it."""
    code = ("import sys\n"
            "import fegrid.cli, fegrid.pipeline, fegrid.keys, fegrid.renames, fegrid.lock, fegrid.store\n"
            "print(sorted(m for m in sys.modules if m.split('.')[0] == 'scipy'))\n"
            "from fegrid import estimate\n"
            "print(estimate.special.stdtr(10.0, -2.0) > 0, 'scipy.special' in sys.modules)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split("\n")
    assert out[0] == "[]"
    assert out[1] == "True True"


def test_the_conda_environment_installs_this_release_not_a_path() -> None:
    """The rules' conda environment pins the package's own version and names no local path (a
    relative editable path resolves against the working directory, so it works only in the checkout);
    its conda packages are the package's own dependencies."""
    import tomllib

    import yaml

    import fegrid
    from fegrid.locations import WORKFLOW_DIR

    env = yaml.safe_load((WORKFLOW_DIR / "envs" / "fegrid.yaml").read_text())
    pip = next(d["pip"] for d in env["dependencies"] if isinstance(d, dict))
    assert pip == [f"fegrid=={fegrid.__version__}"]
    conda = {str(d).split()[0].lower() for d in env["dependencies"] if isinstance(d, str)}
    project = tomllib.loads((Path(__file__).resolve().parents[1] / "pyproject.toml").read_text())["project"]
    wanted = {re.split(r"[<>=\[ ]", d)[0].lower() for d in project["dependencies"]} - {"snakemake"}
    assert wanted <= conda, wanted - conda
