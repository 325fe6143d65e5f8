"""Where fegrid's own files live: the workflow (Snakefile, rules, scripts) and the config's schema."""

from __future__ import annotations

import shutil
from pathlib import Path

__all__ = ["WORKFLOW_ROOT", "SNAKEFILE", "SCHEMA_PATH", "workflow_root", "pdflatex"]

#: The folder holding the Snakefile (fegrid's source checkout).
WORKFLOW_ROOT = Path(__file__).resolve().parents[2]
SNAKEFILE = WORKFLOW_ROOT / "Snakefile"
#: The config's JSON Schema (draft 2020-12).
SCHEMA_PATH = Path(__file__).resolve().parents[1] / "schemas" / "config.schema.yaml"


def workflow_root() -> Path:
    """The folder holding the Snakefile (fegrid's source checkout)."""
    return WORKFLOW_ROOT


def pdflatex() -> str | None:
    """The pdflatex executable, or None where it is not installed (then no appendix PDF is built)."""
    return shutil.which("pdflatex")
