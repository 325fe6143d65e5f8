"""fegrid: declare a grid of fixed-effects panel regressions once, fit every specification."""

from __future__ import annotations

__version__ = "0.2.0"

__all__ = ["__version__"]
