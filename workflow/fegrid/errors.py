"""Error and warning classes.

Every mistake a user can make (a broken config, an unknown column, duplicate panel keys, an empty
sample) is raised as a :class:`FegridError` subclass whose message is one plain paragraph naming
the key, column or specification at fault. The command line prints that paragraph and exits
non-zero; nothing else is shown to the user.
"""

from __future__ import annotations

__all__ = [
    "FegridError",
    "ConfigError",
    "DataError",
    "EstimationError",
    "FegridWarning",
    "SingletonWarning",
    "ConvergenceWarning",
    "FewClustersWarning",
    "FegridDeprecationWarning",
    "INTERRUPTED",
]

#: what an interrupted ``fegrid`` command says (the command's entry point and :mod:`fegrid.cli`)
INTERRUPTED = "fegrid: interrupted; run the same command again to resume."


class FegridError(Exception):
    """Base class of the errors a user can fix by changing the config or the data."""


class ConfigError(FegridError):
    """The grid declared in the YAML config is invalid."""


class DataError(FegridError):
    """The data file cannot serve the grid (missing column, duplicate keys, wrong type...)."""


class EstimationError(FegridError):
    """A request to the engine that cannot be carried out (unknown covariance kind...)."""


class FegridWarning(UserWarning):
    """Base class of fegrid's warnings, so that tests and users can filter them together."""


class SingletonWarning(FegridWarning):
    """Observations alone in a fixed-effect group were dropped."""


class ConvergenceWarning(FegridWarning):
    """Alternating projections stopped at the iteration cap before reaching the tolerance."""


class FewClustersWarning(FegridWarning):
    """Cluster-robust inference rests on few clusters."""


class FegridDeprecationWarning(FutureWarning):
    """A config spelling that still works but will be removed (see :mod:`fegrid.renames`)."""
