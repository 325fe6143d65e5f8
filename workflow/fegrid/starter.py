"""``fegrid init DATA_FILE``: a commented starter config written from a data file's columns.

The panel's unit and time columns are guessed (by name, then by shape: a unit column repeats its
levels, a time column has few levels and makes (unit, time) unique) and every guess is marked
``# REVIEW`` in the file. The outcome, focal regressor and controls are placeholders taken from
the numeric columns, in file order: a researcher declares them, fegrid cannot know them.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from .data import read_table
from .errors import ConfigError, DataError

__all__ = ["PanelGuess", "guess_panel", "starter_config", "write_starter"]

_UNIT_NAMES = re.compile(r"(^|_)(id|unit|firm|company|person|pid|individual|worker|household|hh|county|country|"
                         r"state|region|district|municipality|school|hospital|plant|store|farm|orchard|nr)(_|$)",
                         re.IGNORECASE)
_TIME_NAMES = re.compile(r"(^|_)(year|yr|time|period|date|month|quarter|qtr|week|wave|season|t)(_|$)",
                         re.IGNORECASE)


@dataclass(frozen=True)
class PanelGuess:
    """The guessed panel keys and the numeric columns left for the grid, with the reasons."""

    unit: str
    time: str | None
    time_frequency: str | None
    numeric: tuple[str, ...]
    why: dict[str, str]


def _levels(frame: pd.DataFrame, col: str) -> int:
    return int(frame[col].nunique(dropna=True))


def _frequency(values: pd.Series) -> str | None:
    """monthly / quarterly / yearly for a column of dates (or date-like labels), None for numbers."""
    if pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_datetime64_any_dtype(values):
        return None
    try:
        dates = pd.to_datetime(values.dropna().astype(str) if not pd.api.types.is_datetime64_any_dtype(values)
                               else values.dropna(), errors="raise")
    except (ValueError, TypeError):
        return None
    months = set(dates.dt.month.unique().tolist())
    if len(months) == 1:
        return "yearly"
    if months <= {1, 4, 7, 10} or months <= {3, 6, 9, 12}:
        return "quarterly"
    return "monthly"


def guess_panel(frame: pd.DataFrame) -> PanelGuess:
    """Guess the unit and time columns of a panel (see the module docstring)."""
    n = len(frame)
    if n == 0:
        raise DataError("The data file has a header but no rows; fegrid init needs some data to look at.")
    cols = [str(c) for c in frame.columns]
    why: dict[str, str] = {}

    def repeats(c: str) -> bool:
        k = _levels(frame, c)
        return 1 < k <= n // 2 and not frame[c].isna().any()

    unit_candidates = [c for c in cols if repeats(c) and not pd.api.types.is_float_dtype(frame[c])]
    named = [c for c in unit_candidates if _UNIT_NAMES.search(c)]
    if named:
        unit = named[0]
        why[unit] = "its name reads like a unit identifier and its values repeat"
    elif unit_candidates:
        unit = max(unit_candidates, key=lambda c: _levels(frame, c))
        why[unit] = "the non-float column whose values repeat with the most levels"
    else:
        raise DataError("fegrid init found no column whose values repeat (a panel unit is observed several "
                        "times); is this a panel? Write the config by hand (see config/README.md).")
    time = None
    for c in sorted((c for c in cols if c != unit and repeats(c)), key=lambda c: (not _TIME_NAMES.search(c),
                                                                                     _levels(frame, c))):
        if not frame.duplicated([unit, c]).any():
            time = c
            why[c] = ("its name reads like a period" if _TIME_NAMES.search(c) else
                      "few levels, and (unit, it) identifies every row")
            break
    frequency = _frequency(frame[time]) if time is not None else None
    keys = {unit, time}
    numeric = tuple(c for c in cols if c not in keys and pd.api.types.is_numeric_dtype(frame[c])
                    and not pd.api.types.is_bool_dtype(frame[c]) and _levels(frame, c) > 1)
    return PanelGuess(unit, time, frequency, numeric, why)


def _yaml_name(name: str) -> str:
    return name if re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", name) else f'"{name}"'


def starter_config(data_path: str, guess: PanelGuess, run_name: str) -> str:
    """The starter config's text: valid, runnable and commented; guesses and placeholders say so."""
    q = _yaml_name
    if len(guess.numeric) < 2:
        raise DataError(f"The data file '{data_path}' has fewer than two numeric columns besides the panel keys; "
                        "a grid needs an outcome and a focal regressor.")
    outcome, focal, *rest = guess.numeric
    controls = rest[:3]
    u, t = q(guess.unit), q(guess.time) if guess.time else None
    lines = [
        "# fegrid grid, written by `fegrid init` from the columns of the data file.",
        "# Lines marked REVIEW are guesses; every other choice is a starting point to edit.",
        "# Declare the grid before looking at any results. The keys are explained in fegrid's config/README.md.",
        "",
        f"run_name: {run_name}            # outputs go to reports/{run_name}/",
        "",
        "data:",
        f"  path: {data_path}",
        f"  unit: {u}        # REVIEW: guessed ({guess.why[guess.unit]})",
    ]
    if t:
        lines.append(f"  time: {t}        # REVIEW: guessed ({guess.why[guess.time]})")  # type: ignore[index]
        if guess.time_frequency:
            lines.append(f"  time_frequency: {guess.time_frequency}   # REVIEW: guessed from the dates")
    else:
        lines.append("  # time: no column makes (unit, time) unique; name the period column here")
    lines += [
        "",
        f"outcomes: [{q(outcome)}]            # PLACEHOLDER: the first numeric column; name your outcome(s)",
        f"focal_regressors: [{q(focal)}]      # PLACEHOLDER: the regressor whose effect is estimated",
        "",
        "# Absorbed fixed effects, one choice per line: they remove only what is fixed within each level.",
        "absorb:",
        f"  unit: [{u}]",
    ]
    if t:
        lines.append(f"  unit_time: [{u}, {t}]")
    lines += [
        "",
        "# Standard errors: heteroskedasticity-robust, and clustered by the unit.",
        "clustering:",
        "  hc1: {kind: hc1}",
        f"  unit: {{kind: clustered, by: {u}}}",
        "",
        "samples:",
        "  all: {}",
    ]
    if t:
        lines.append("  balanced: {balanced: true}   # units observed in every period")
    lines += ["", "control_sets:"]
    if controls:
        lines.append(f"  combinations_of: [{', '.join(q(c) for c in controls)}]   # PLACEHOLDER: every subset")
    else:
        lines.append("  named: {none: []}")
    lines += [
        "",
        "# The headline specification, one choice per dimension (a dimension with one choice may be left",
        "# out; name the outcome and focal regressor here once you list several). It is flagged in the",
        "# ledger, marked in the figures and compared in the summary and the tables. REVIEW: choose yours.",
        "baseline:",
        f"  absorb: {'unit_time' if t else 'unit'}",
        "  clustering: unit",
        "  sample: all",
    ]
    if controls:
        lines.append(f"  controls: {q('+'.join(controls))}")
    lines += [
        "",
        "# Estimators (a grid dimension; least squares alone when left out). Uncomment to add 2SLS with",
        "# your instrument(s), or Poisson PML for a count or other non-negative outcome with zeros.",
        "# estimators:",
        "#   least_squares: {method: least_squares}",
        "#   iv: {method: two_stage_least_squares, instruments: [YOUR_INSTRUMENT]}",
        "#   poisson: {method: poisson_pml}",
        "# For a 0/1 treatment that units adopt at different times and keep, name it in data.treatment",
        "# (a focal regressor) and add the staggered-adoption estimators, e.g.:",
        "#   event_study: {method: event_study, window: [-4, 4]}",
        "#   imputation: {method: imputation, window: [-4, 4]}",
        "#   group_time: {method: group_time, window: [-4, 4], controls_from: not_yet_treated}",
        "",
        "confidence_level: 0.95",
        "",
        "# Joint tests across the curve (bootstrap draws under the null); 0 turns them off.",
        "joint_inference:",
        "  draws: 200",
        f"  resample: {u}",
        "",
    ]
    return "\n".join(lines)


def write_starter(data_file: str | Path, out: str | Path, *, run_name: str | None = None) -> PanelGuess:
    """Write a starter config for ``data_file`` to ``out`` (never over an existing file)."""
    out = Path(out)
    if out.exists():
        raise ConfigError(f"'{out}' exists already; fegrid init never overwrites a config (use --out NEW.yaml).")
    frame = read_table(data_file)
    guess = guess_panel(frame)
    name = run_name or re.sub(r"[^A-Za-z0-9_]+", "_", Path(data_file).name.split(".")[0]).strip("_") or "grid"
    text = starter_config(str(data_file), guess, name)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text)
    return guess
