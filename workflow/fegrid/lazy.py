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

__all__ = ["LazyModule", "load_all"]

#: Every stand-in made, so that :func:`load_all` can import their modules before something is timed.
_MADE: list[LazyModule] = []


class LazyModule:
    """A stand-in for the module ``name`` that imports it on the first attribute read (after which every
    read is the module's own attribute, through one dictionary lookup)."""

    def __init__(self, name: str) -> None:
        self._name = name
        self._module: ModuleType | None = None
        _MADE.append(self)

    def load(self) -> ModuleType:
        """The module, imported now if it was not yet."""
        if self._module is None:
            self._module = importlib.import_module(self._name)
        return self._module

    def __getattr__(self, attribute: str) -> Any:
        if attribute.startswith("__"):  # copy, pickle and inspection probe dunders: not the module's
            raise AttributeError(attribute)
        return getattr(self._module or self.load(), attribute)

    def __repr__(self) -> str:
        return f"<lazy module {self._name!r}>"


def load_all() -> None:
    """Import every module held by a stand-in: before CPU time is measured and scaled up (``fegrid plan``'s
    estimate), so that a one-time import is not counted as the cost of the first fit or draw."""
    for lazy in _MADE:
        lazy.load()
