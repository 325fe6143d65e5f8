"""SciPy, imported when first used rather than when fegrid is imported.

Every ``fegrid`` command and the workflow's parse import fegrid's modules to plan and check a grid, and
none of that needs SciPy; importing it took about 0.2 s of every start (a third of a bare ``fegrid``
command's import time, and of the time Snakemake spends before its first job). The modules that compute
hold a :class:`LazyModule` in its place, which imports the real module on the first attribute read.
"""

from __future__ import annotations

import importlib
from types import ModuleType
from typing import Any

__all__ = ["LazyModule"]


class LazyModule:
    """A stand-in for the module ``name`` that imports it on the first attribute read (after which every
    read is the module's own attribute, through one dictionary lookup)."""

    def __init__(self, name: str) -> None:
        self._name = name
        self._module: ModuleType | None = None

    def __getattr__(self, attribute: str) -> Any:
        if attribute.startswith("__"):  # copy, pickle and inspection probe dunders: not the module's
            raise AttributeError(attribute)
        module = self._module
        if module is None:
            module = self._module = importlib.import_module(self._name)
        return getattr(module, attribute)

    def __repr__(self) -> str:
        return f"<lazy module {self._name!r}>"
