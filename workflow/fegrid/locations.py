"""Where fegrid's own files live: the workflow (Snakefile, rules, scripts, schema, report captions,
profiles, software environment) and the demo's config.

An installed wheel carries them as package data in ``fegrid/_workflow/`` (found with
:mod:`importlib.resources`); a source checkout keeps them in ``workflow/`` beside the package, and
the build copies them into the wheel (``pyproject.toml``, ``force-include``). Both hold the same
tree, so every rule, script and caption is found the same way relative to the Snakefile. Snakemake
needs real files: fegrid runs from an unpacked installation, not from a zip archive.
"""

from __future__ import annotations

import shutil
from importlib import resources
from pathlib import Path

__all__ = ["WORKFLOW_DIR", "SNAKEFILE", "SCHEMA_PATH", "DEMO_CONFIG", "SOURCE_CHECKOUT", "PROFILES",
           "workflow_root", "pdflatex"]

_PACKAGE = Path(str(resources.files("fegrid")))
_PACKAGED = _PACKAGE / "_workflow"
_IN_WHEEL = (_PACKAGED / "Snakefile").is_file()

#: The folder holding the workflow's Snakefile, rules/, scripts/, schemas/, report/, profiles/, envs/.
WORKFLOW_DIR = _PACKAGED if _IN_WHEEL else _PACKAGE.parent
SNAKEFILE = WORKFLOW_DIR / "Snakefile"
#: The config's JSON Schema (draft 2020-12).
SCHEMA_PATH = WORKFLOW_DIR / "schemas" / "config.schema.yaml"
#: Snakemake profiles shipped with fegrid, by name (``fegrid run --profile slurm``).
PROFILES = WORKFLOW_DIR / "profiles"
#: The invented demo's grid.
DEMO_CONFIG = WORKFLOW_DIR / "demo" / "config.yaml" if _IN_WHEEL else _PACKAGE.parents[1] / "config" / "config.yaml"
#: The source checkout fegrid runs from (its git commit goes into the manifest), or None when installed.
SOURCE_CHECKOUT: Path | None = None if _IN_WHEEL else _PACKAGE.parents[1]


def workflow_root() -> Path:
    """The folder holding the workflow's Snakefile (package data, or ``workflow/`` of a checkout)."""
    return WORKFLOW_DIR


def pdflatex() -> str | None:
    """The pdflatex executable, or None where it is not installed (then no appendix PDF is built)."""
    return shutil.which("pdflatex")
