"""fegrid: declare a grid of fixed-effects panel regressions once, fit every specification.

From Python, :func:`fit_grid` fits a grid in this process and returns a :class:`GridResult`
(the ledger, the run's metadata, the summary, the figure and tables); the ``fegrid`` command runs
the same steps through Snakemake (cached, resumable, on a laptop or a cluster).
"""

from __future__ import annotations

__version__ = "0.6.12"

__all__ = ["__version__", "fit_grid", "GridResult", "FegridError"]


def __getattr__(name: str):  # the API loads pandas and numpy only when it is used
    if name in ("fit_grid", "GridResult"):
        from . import api

        return getattr(api, name)
    if name == "FegridError":
        from .errors import FegridError

        return FegridError
    raise AttributeError(f"module 'fegrid' has no attribute {name!r}")
