"""fegrid from Python: fit a declared grid in this process and work with its ledger.

For notebooks and scripts. The steps are the pipeline's own (the functions the Snakemake rules
call), run one after another without Snakemake; the ledger holds the same numbers, byte for byte,
as a ``fegrid run`` of the same config and data.

>>> import fegrid
>>> from fegrid.demo import make_orchards
>>> config = {
...     "run_name": "api_doctest",
...     "data": {"path": "unused.csv", "unit": "orchard", "time": "season"},
...     "outcomes": ["log_yield"], "focal_regressors": ["irrigation"],
...     "absorb": {"orchard": ["orchard"], "orchard_season": ["orchard", "season"]},
...     "clustering": {"valley": {"kind": "clustered", "by": "valley"}},
...     "joint_inference": {"draws": 0},
... }
>>> result = fegrid.fit_grid(config, data=make_orchards(), progress=False)
>>> len(result.ledger), result.metadata["specifications"]
(2, 2)
>>> float(result.summary()["specs"].iloc[0])
2.0
"""

from __future__ import annotations

import copy
import hashlib
import io
import sys
import tempfile
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd

from . import __version__, pipeline
from .errors import FegridError
from .grid import read_yaml
from .pipeline import Plan, draw_null_chunk, grid_seeds
from .store import atomic_write
from .summary import choice_medians, curve_summary, influence

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = ["fit_grid", "GridResult"]


@dataclass(frozen=True)
class GridResult:
    """A fitted grid: the ledger (one row per specification) and what produced it.

    Attributes
    ----------
    ledger
        The ledger, with the columns and dtypes of ``ledger.parquet`` (see the README).
    metadata
        The run's name, fegrid's version, the SHA-256 of the data that was fitted, the number of
        specifications, the seeds, the confidence level and where the run's files are.
    """

    ledger: pd.DataFrame
    metadata: dict[str, Any]
    _plan: Plan = field(repr=False)
    # a temporary run folder lives as long as the result (cache=None)
    _scratch: Any = field(default=None, repr=False, compare=False)

    @property
    def level(self) -> float:
        """The confidence level of the grid's intervals and significance shares."""
        return float(self.metadata["confidence_level"])

    def summary(self) -> pd.DataFrame:
        """One row per outcome x focal curve: counts, the baseline, the median and quartiles, shares."""
        return curve_summary(self.ledger, self.level)

    def coefficients(self) -> pd.DataFrame:
        """Every kept coefficient of every specification (``coefficients.parquet``): estimate, SE, t,
        p, interval and df per term, focal first, and the term's row of the covariance matrix."""
        return pd.read_parquet(self._plan.paths.coefficients_parquet)

    def choices(self) -> pd.DataFrame:
        """How each choice of each dimension shifts the estimate, on matched pairs of specifications."""
        return choice_medians(self.ledger)

    def influence(self) -> pd.DataFrame:
        """Which single choice, removed from the grid, moves the curve's median most."""
        return influence(self.ledger)

    def figure(self, outcome: str | None = None, focal: str | None = None, curve: str | None = None) -> Figure:
        """The specification-curve figure of one curve (outcome x focal x curve; the only one when not named)."""
        from .figures import draw_curve

        part = self.ledger
        for column, value in (("outcome", outcome), ("focal", focal), ("curve", curve)):
            if value is not None:
                part = part[part[column] == value]
        pairs = sorted({(o, f, c) for o, f, c in zip(part["outcome"], part["focal"], part["curve"])})
        if len(pairs) != 1:
            listed = ", ".join(f"{o} ~ {f} [{c}]" for o, f, c in pairs) or "none"
            raise FegridError(f"figure() draws one curve; name outcome=, focal= and curve= (curves: {listed}).")
        return draw_curve(part, level=self.level, labels=self._plan.grid.raw.get("labels"))

    def table(self, fmt: str = "markdown") -> str:
        """The per-curve summary as text: ``markdown`` (GitHub tables) or ``latex`` (booktabs)."""
        from .report import summary_latex, summary_markdown

        if fmt == "markdown":
            return summary_markdown(self.ledger, self.level)
        if fmt == "latex":
            return summary_latex(self.ledger, self.level)
        raise FegridError(f"table(fmt='{fmt}'): the formats are 'markdown' and 'latex'.")

    def joint_tests(self, *, progress: bool = False) -> pd.DataFrame:
        """Joint tests across each curve from the grid's bootstrap draws under the null
        (``joint_inference`` in the config; see :mod:`fegrid.joint`)."""
        from .joint import joint_tests

        plan = self._plan
        grid = plan.grid
        if grid.draws <= 0:
            raise FegridError("The config asks for no bootstrap draws (joint_inference.draws is 0).")
        files = plan.joint_paths()
        for chunk, out in enumerate(files):
            if not out.is_file():
                draw_null_chunk(grid, plan.snapshot_path, plan.joint_key, chunk, out)
            _say(progress, f"bootstrap draws: chunk {chunk + 1} of {len(files)}")
        draws = pd.concat([pd.read_parquet(f) for f in files], ignore_index=True)
        return joint_tests(self.ledger, draws, grid.level)


def _say(progress: bool, text: str) -> None:
    if progress:
        print(f"fegrid: {text}", file=sys.stderr, flush=True)


def _data_file(data: pd.DataFrame | str | Path, folder: Path) -> str:
    """A DataFrame becomes a Parquet file named by its content in ``folder``; a path is kept."""
    if not isinstance(data, pd.DataFrame):
        return str(data)
    buffer = io.BytesIO()
    data.to_parquet(buffer, index=False)
    content = buffer.getvalue()
    path = folder / "input" / f"{hashlib.sha256(content).hexdigest()[:16]}.parquet"
    if not path.is_file():
        atomic_write(path, lambda fh: fh.write(content))
    return str(path)


def fit_grid(config: str | Path | Mapping[str, Any], *, data: pd.DataFrame | str | Path | None = None,
             cache: str | Path | None = None, progress: bool = True) -> GridResult:
    """Fit every specification of a grid in this process and return its ledger.

    Parameters
    ----------
    config
        The grid: a YAML file or the same content as a mapping (checked against the schema).
    data
        The panel, as a DataFrame or a file (CSV, Parquet, Feather, .dta); replaces the config's
        ``data.path``. Default: the config's own file.
    cache
        A folder for the run's files (``<cache>/<run_name>/``: ledger, results and demeaned
        columns, reused by the next call with the same data). Default: a temporary folder that
        lives as long as the returned object.
    progress
        Print one line per fitted job on standard error.

    Returns
    -------
    GridResult
        The ledger and the run's metadata, with methods for the summary, the figure and tables.

    Raises
    ------
    FegridError
        For a mistake in the config or the data, with a one-paragraph message naming the key,
        column or specification.
    """
    raw = copy.deepcopy(dict(read_yaml(config) if isinstance(config, (str, Path)) else config))
    scratch = tempfile.TemporaryDirectory(prefix="fegrid-") if cache is None else None
    root = Path(scratch.name if scratch is not None else cache)  # type: ignore[arg-type]
    if data is not None:
        if not isinstance(raw.get("data"), Mapping):
            raise FegridError("The config has no 'data' block (data.unit and data.time name the panel's keys).")
        raw["data"] = {**raw["data"], "path": _data_file(data, root)}
    plan, ledger = pipeline.fit_grid(raw, root=root, say=(lambda text: _say(True, text)) if progress else None)
    metadata = {
        "run_name": plan.grid.run_name, "fegrid_version": __version__, "data_sha256": plan.data_sha256,
        "data_path": plan.grid.data_path, "specifications": len(plan.specs), "jobs": len(plan.jobs),
        "confidence_level": plan.grid.level, "seeds": grid_seeds(plan.grid),
        "run_folder": None if scratch is not None else str(plan.paths.run),
    }
    return GridResult(ledger=ledger, metadata=metadata, _plan=plan, _scratch=scratch)
