"""Summaries of a ledger: how the curve of estimates looks and how robust the baseline is."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .defaults import DEFAULTS
from .ledger import DIMENSIONS, PAIR, STATUS_FAILED, STATUS_NOT_IDENTIFIED, STATUS_OK

__all__ = ["curve_summary", "choice_medians", "influence", "CHOICE_COLUMNS"]



def _percentile_of(values: np.ndarray, x: float) -> float:
    """Share (in %) of the curve at or below ``x``, ties counted half (mid-rank)."""
    if len(values) == 0 or not np.isfinite(x):
        return float("nan")
    below = np.sum(values < x)
    equal = np.sum(values == x)
    return float(100.0 * (below + 0.5 * equal) / len(values))


def curve_summary(ledger: pd.DataFrame, level: float = DEFAULTS["confidence_level"]) -> pd.DataFrame:
    """One row per curve (outcome x focal regressor x curve; see :data:`fegrid.ledger.PAIR`).

    Columns: counts by status; the baseline's estimate, its percentile in the curve and its
    p-value; the share of fitted estimates with the baseline's sign; the dominant sign (the sign of
    the median) and the share significant at ``1 - level`` with that sign; median, quartiles,
    minimum and maximum of the fitted estimates.
    """
    alpha = 1.0 - level
    rows = []
    for (outcome, focal, curve), part in ledger.groupby(PAIR, sort=True):
        ok = part[part["status"] == STATUS_OK]
        est = ok["estimate"].to_numpy(dtype=float)
        base = part[part["is_baseline"]]
        base_est = float(base["estimate"].iloc[0]) if len(base) else float("nan")
        median = float(np.median(est)) if len(est) else float("nan")
        dominant = np.sign(median) if len(est) else 0.0
        base_sign = np.sign(base_est) if np.isfinite(base_est) else dominant
        significant = (ok["p_value"] < alpha) & (np.sign(ok["estimate"]) == dominant)
        rows.append({
            "outcome": outcome,
            "focal": focal,
            "curve": curve,
            "specs": len(part),
            "fitted": len(ok),
            "not_identified": int((part["status"] == STATUS_NOT_IDENTIFIED).sum()),
            "failed": int((part["status"] == STATUS_FAILED).sum()),
            "baseline_estimate": base_est,
            "baseline_p_value": float(base["p_value"].iloc[0]) if len(base) else float("nan"),
            "baseline_percentile": _percentile_of(est, base_est),
            "share_baseline_sign": float(np.mean(np.sign(est) == base_sign)) if len(est) else float("nan"),
            "dominant_sign": "+" if dominant > 0 else ("-" if dominant < 0 else "0"),
            "share_significant_dominant": float(significant.mean()) if len(est) else float("nan"),
            "median": median,
            "q25": float(np.quantile(est, 0.25)) if len(est) else float("nan"),
            "q75": float(np.quantile(est, 0.75)) if len(est) else float("nan"),
            "min": float(est.min()) if len(est) else float("nan"),
            "max": float(est.max()) if len(est) else float("nan"),
        })
    return pd.DataFrame(rows)


#: Columns of :func:`choice_medians`.
CHOICE_COLUMNS = ["outcome", "focal", "curve", "dimension", "choice", "reference", "specs", "median", "matched_pairs",
                  "matched_shift", "dimension_effect"]


def _reference_choice(part: pd.DataFrame, dim: str) -> str:
    """The baseline's choice in ``dim`` when the baseline is in this curve, else the commonest choice."""
    base = part[part["is_baseline"]] if "is_baseline" in part else part.iloc[0:0]
    if len(base):
        return str(base[dim].iloc[0])
    counts = part[dim].astype(str).value_counts()
    return str(sorted(counts[counts == counts.max()].index)[0])


def choice_medians(ledger: pd.DataFrame) -> pd.DataFrame:
    """The effect of each choice on the estimate, measured on matched specifications.

    For every outcome x focal pair and every dimension, each choice is compared with a reference
    choice (the baseline's, or the commonest when the baseline is not in the curve) on pairs of
    fitted specifications that differ only in that dimension: ``matched_shift`` is the median of
    the estimate's change over those ``matched_pairs``. Comparing medians of all specifications under
    each choice would confound the choice with the grid's composition (exclusion rules make the
    choices' sets of specifications differ); matched pairs do not, so a clustering choice, which
    cannot move a point estimate, shows a shift of exactly zero. ``dimension_effect`` is the largest
    absolute matched shift in the dimension; ``median`` is the plain median under the choice, kept
    for description.
    """
    ok = ledger[ledger["status"] == STATUS_OK]
    rows = []
    for (outcome, focal, curve), part in ok.groupby(PAIR, sort=True):
        for dim in DIMENSIONS:
            if dim in PAIR:
                continue
            others = [d for d in DIMENSIONS if d != dim]
            # each specification's match: the one with every other choice equal and the reference choice here
            match = part.groupby(others, sort=False, dropna=False).ngroup().to_numpy()
            choices = part[dim].astype(str).to_numpy()
            estimate = part["estimate"].to_numpy(dtype=float)
            reference = _reference_choice(part, dim)
            on_reference = np.full(int(match.max()) + 1 if len(match) else 0, np.nan)
            at = np.flatnonzero(choices == reference)[::-1]  # the first one where a match repeats
            on_reference[match[at]] = estimate[at]
            meds = part.groupby(part[dim].astype(str), sort=True)["estimate"].agg(["median", "size"])
            dim_rows = []
            for choice, row in meds.iterrows():
                mine = choices == choice
                diffs = estimate[mine] - on_reference[match[mine]]
                diffs = pd.Series(diffs[~np.isnan(diffs)])
                dim_rows.append({
                    "outcome": outcome, "focal": focal, "curve": curve,
                    "dimension": dim, "choice": choice, "reference": reference,
                    "specs": int(row["size"]), "median": float(row["median"]), "matched_pairs": len(diffs),
                    "matched_shift": float(diffs.median()) if len(diffs) else float("nan"),
                })
            shifts = [abs(r["matched_shift"]) for r in dim_rows if np.isfinite(r["matched_shift"])]
            effect = max(shifts) if shifts else float("nan")
            rows += [{**r, "dimension_effect": effect} for r in dim_rows]
    return pd.DataFrame(rows, columns=CHOICE_COLUMNS)


def influence(ledger: pd.DataFrame) -> pd.DataFrame:
    """Leave-one-level-out influence: which dropped level moves the estimate most.

    Samples made by a ``drop_each`` generator are named ``<generator>:<level>``. Each such fitted
    specification is compared with the same specification (every other choice equal) on the
    baseline's sample; without one, with the median over the generator's levels. ``rank`` orders
    the levels of each group by the size of the change (1 = the most influential).
    """
    ok = ledger[(ledger["status"] == STATUS_OK) & ledger["sample"].astype(str).str.contains(":", regex=False)]
    columns = ["generator", "dropped", "outcome", "focal", "absorb", "clustering", "controls", "weights",
               "estimator", "estimate", "reference", "reference_sample", "change", "rank"]
    if ok.empty:
        return pd.DataFrame(columns=columns)
    base = ledger[ledger["is_baseline"]]
    base_sample = str(base["sample"].iloc[0]) if len(base) else ""
    others = ["outcome", "focal", "absorb", "clustering", "controls", "weights", "estimator"]
    on_base = ledger[(ledger["sample"] == base_sample) & (ledger["status"] == STATUS_OK)]
    reference = on_base.set_index(others)["estimate"]
    parts = ok["sample"].str.split(":", n=1, expand=True)
    frame = ok.assign(generator=parts[0], dropped=parts[1])
    rows = []
    for key, group in frame.groupby(["generator", *others], sort=True):
        other_key = tuple(key[1:])
        if base_sample and ":" not in base_sample and other_key in reference.index:
            ref, ref_name = float(reference.loc[other_key]), base_sample
        else:
            ref, ref_name = float(group["estimate"].median()), "median over levels"
        change = group["estimate"] - ref
        order = change.abs().rank(ascending=False, method="first").astype(int)
        for (_, r), ch, rk in zip(group.iterrows(), change, order):
            rows.append({"generator": key[0], "dropped": r["dropped"], **dict(zip(others, other_key)),
                         "estimate": r["estimate"], "reference": ref, "reference_sample": ref_name,
                         "change": ch, "rank": int(rk)})
    return pd.DataFrame(rows, columns=columns).sort_values(["generator", *others, "rank"], ignore_index=True)
