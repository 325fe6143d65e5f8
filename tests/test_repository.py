"""The repository's own promises: CI runs the README's test command; the code passes ruff."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

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
