"""Every kept coefficient of every specification, and linear combinations of them.

The engine keeps, per specification, every coefficient it estimated (focal regressor first, then
other endogenous regressors, then the controls it did not drop) with their covariance matrix
under the specification's covariance kind and its df (:class:`fegrid.estimate.Coefficients`).
Fit jobs store them as JSON text beside each result; the ledger step writes the long table
``coefficients.parquet`` (with each row's covariance row) and ``coefficients.csv`` (without), and
evaluates the config's ``combinations`` on them, with no refit:

* ``sum: {term: weight, ...}``: the combination ``c'b`` with standard error ``sqrt(c'Vc)``, a t test
  and interval on the specification's df;
* ``jointly_zero: [term, ...]``: the Wald statistic ``b_R' V_R^{-1} b_R / q`` against ``F(q, df)``.

A specification that does not keep every term a combination names gets empty cells for it.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from .estimate import Coefficients
from .lazy import LazyModule

special = LazyModule("scipy.special")

__all__ = ["STORED_COLUMN", "COEFFICIENT_COLUMNS", "encode", "decode", "coefficient_table", "combination_columns",
           "evaluate_combinations"]

#: The column of a fit job's results (and the key of a stored result) that holds the JSON text.
STORED_COLUMN = "coefficients"

#: Columns of coefficients.csv (coefficients.parquet adds ``covariance``: the row of the covariance
#: matrix that belongs to the term, in the order of ``position``).
COEFFICIENT_COLUMNS: tuple[str, ...] = ("spec_id", "term", "position", "estimate", "std_error", "t_stat", "p_value",
                                        "ci_low", "ci_high", "df_inference")


def encode(coefficients: Coefficients | None) -> str:
    """JSON text of one specification's coefficients ("" when none were kept)."""
    if coefficients is None:
        return ""
    return json.dumps({"terms": list(coefficients.terms), "estimates": coefficients.estimates.tolist(),
                       "covariance": coefficients.covariance.tolist(), "df": coefficients.df})


def decode(text: str) -> Coefficients | None:
    if not isinstance(text, str) or not text:
        return None
    body = json.loads(text)
    return Coefficients(tuple(body["terms"]), np.asarray(body["estimates"], dtype=float),
                        np.asarray(body["covariance"], dtype=float).reshape(len(body["terms"]), -1), float(body["df"]))


def coefficient_table(encoded: Mapping[str, str], level: float) -> pd.DataFrame:
    """The long table: one row per specification and kept coefficient."""
    rows: list[dict[str, Any]] = []
    crit_of: dict[float, float] = {}
    for spec_id in sorted(encoded):
        c = decode(encoded[spec_id])
        if c is None:
            continue
        if c.df not in crit_of:
            crit_of[c.df] = float(special.stdtrit(c.df, 0.5 + level / 2))
        crit = crit_of[c.df]
        for j, term in enumerate(c.terms):
            se = float(np.sqrt(max(c.covariance[j, j], 0.0)))
            est = float(c.estimates[j])
            t = est / se if se > 0 else float("nan")
            rows.append({"spec_id": spec_id, "term": term, "position": j, "estimate": est, "std_error": se,
                         "t_stat": t, "p_value": float(2 * special.stdtr(c.df, -abs(t))) if se > 0 else float("nan"),
                         "ci_low": est - crit * se, "ci_high": est + crit * se, "df_inference": c.df,
                         "covariance": c.covariance[j].tolist()})
    return pd.DataFrame(rows, columns=[*COEFFICIENT_COLUMNS, "covariance"])


def combination_columns(name: str, body: Mapping[str, Any]) -> list[str]:
    """The ledger columns of one declared combination."""
    if "sum" in body:
        return [f"combination_{name}_{part}" for part in ("estimate", "std_error", "p_value", "ci_low", "ci_high")]
    return [f"combination_{name}_{part}" for part in ("statistic", "p_value")]


def evaluate_combinations(encoded: Mapping[str, str], declared: Mapping[str, Mapping[str, Any]],
                          level: float) -> pd.DataFrame:
    """One row per specification (``spec_id`` and the combinations' columns)."""
    columns = ["spec_id"] + [c for name, body in declared.items() for c in combination_columns(name, body)]
    rows = []
    for spec_id in sorted(encoded):
        row: dict[str, Any] = {"spec_id": spec_id}
        c = decode(encoded[spec_id])
        for name, body in declared.items():
            cols = combination_columns(name, body)
            row.update(dict.fromkeys(cols, float("nan")))
            if c is None:
                continue
            terms = list(body["sum"]) if "sum" in body else list(body["jointly_zero"])
            if not set(terms) <= set(c.terms):
                continue
            idx = [c.terms.index(t) for t in terms]
            if "sum" in body:
                weights = np.array([float(body["sum"][t]) for t in terms])
                est = float(weights @ c.estimates[idx])
                se = float(np.sqrt(max(weights @ c.covariance[np.ix_(idx, idx)] @ weights, 0.0)))
                crit = float(special.stdtrit(c.df, 0.5 + level / 2))
                p = float(2 * special.stdtr(c.df, -abs(est / se))) if se > 0 else float("nan")
                row.update(zip(cols, (est, se, p, est - crit * se, est + crit * se)))
            else:
                b = c.estimates[idx]
                v = c.covariance[np.ix_(idx, idx)]
                try:
                    stat = float(b @ np.linalg.solve(v, b)) / len(idx)
                except np.linalg.LinAlgError:
                    continue
                row.update(zip(cols, (stat, float(special.fdtrc(len(idx), c.df, stat)))))
        rows.append(row)
    return pd.DataFrame(rows, columns=columns)
