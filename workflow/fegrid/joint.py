"""Joint inference across the specification curve (Simonsohn, Simmons & Nelson 2020).

Is the curve as a whole more than the grid would give under the null of no effect? For every
specification ``k`` with estimate ``b_k``, the null is imposed by ``y*_k = y - b_k x``; bootstrap
samples are drawn (the same draw for every specification; whole units or clusters are drawn with
replacement, never rows, and a unit drawn twice enters as two units); a draw's sample is the copies of
the sample's rows in the data; the whole grid is refitted on each draw. Because least squares and
2SLS are linear in ``y``, the estimate on ``y*_k`` is the draw's ordinary estimate less ``b_k``,
with the same residuals, so each draw is one ordinary refit of the grid (for least squares and 2SLS,
a reweighting of the data already demeaned: :mod:`fegrid.reweight`). Poisson PML is not linear in
``y``: its null is imposed multiplicatively, ``y*_k = y exp(-b_k x)`` (whose conditional mean no
longer depends on ``x``), and each draw refits the specification on ``y*_k`` (the draw's rows are
marked ``imposed``), on the drawn rows weighted by their copies.

Three statistics of the curve are compared with their bootstrap distributions under the null,
each curve (observed or drawn) read in its own dominant direction, the sign of its median:

* the median estimate (compared in absolute value);
* the share of specifications significant at ``1 - level`` with the dominant sign;
* Stouffer's Z of the specifications' p-values: ``sum_k s_k Phi^{-1}(1 - p_k / 2) / sqrt(K)`` with
  ``s_k = +1`` when estimate ``k`` has the dominant sign and ``-1`` otherwise.

Draw ``d`` uses ``numpy.random.default_rng([seed, d])``, so results do not depend on how the draws
are split into jobs or in which order jobs run.

Linearized draws (``joint_inference.method: linearized``, :func:`linearized_draws`) are an explicit,
faster approximation of the same draws: each specification is fitted once, on the data, with each
row's first-order influence on its estimate (``psi_i``, the row's term of the cluster-robust
sandwich: :func:`fegrid.estimate.fit_block` with ``influence=True``), and a draw that takes level
``l`` of the resampling column ``c_l`` times moves estimate ``k`` by ``sum_l (c_l - 1) Psi_lk``, with
``Psi_lk`` the influence summed over the level's rows: the first-order expansion of the refit on
the draw (the infinitesimal jackknife, Efron 1982; the same expansion underlies the score bootstrap
of Kline & Santos 2012). The draws' estimates are centred on the observed ones (the null is imposed
by centring, for every method); a draw's standard error is the observed one scaled by
``sqrt(sum_l c_l Psi_lk^2 / sum_l Psi_lk^2)``, as the copies scale a sandwich clustered by level, and
its df is the observed one, so a draw costs two matrix products for the whole grid. Its p-values
are checked by Monte Carlo against the refits' in tests/test_joint.py (they agree closely, and hold
the same size); the refit stays the default. A first-order expansion is no guide where an estimate
is far from normal, such as a weakly identified 2SLS.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd

from .errors import FegridError
from .estimate import SpecRequest, fit_block
from .estimators import POISSON
from .grid import LINEARIZED, REFIT, Grid, Spec
from .lazy import LazyModule
from .ledger import PAIR, STATUS_OK
from .reweight import BATCH_DRAWS, Draw, draw_levels, draw_picks, prepare_blocks
from .samples import SampleDef, apply_sample, sample_rows

special = LazyModule("scipy.special")

__all__ = ["REFIT", "LINEARIZED", "method_text", "shared_cluster_caution", "resample_panel", "stack_draw",
           "without_wild", "draw_curves",
           "linearized_draws", "curve_statistics", "joint_tests",
           "STATISTICS",
           "DRAW_COLUMNS"]

STATISTICS = ("median_estimate", "share_significant", "stouffer_z")

def method_text(method: str) -> str:
    """How the draws are computed, in a clause for the reports."""
    if method == LINEARIZED:
        return ("linearized draws, an approximation: each specification is fitted once, and each draw moves its "
                "estimate by the draw's copies of every level times that level's first-order influence on it "
                "(Efron 1982), and its standard error as the copies scale the influences' sum of squares")
    return "the whole grid is refitted on every draw"


def shared_cluster_caution(grid: Grid, clusterings: Iterable[str]) -> str:
    """A caution when refitted draws put the copies of a drawn level in one cluster ("" otherwise), for
    the clustering choices named in ``clusterings`` (those of the grid's specifications).

    A stacked draw gives each copy its own labels of the unit and the resampling column only, so a
    cluster variable that holds neither (a region above the units, the period side of two-way
    clustering) keeps a drawn level's copies in one cluster, as if they were perfectly correlated
    members of it: the draws' SEs of those specifications grow (about 1.25 times on the demo) and
    the joint tests' p-values of the share significant and of Stouffer's Z come out too small.
    """
    if grid.draws <= 0 or grid.joint_method != REFIT:
        return ""
    copied = {grid.panel.unit, grid.resample}
    shared = {name: sorted(" x ".join(dim) for dim in grid.clustering[name].by if not copied.intersection(dim))
              for name in sorted(set(clusterings)) if name in grid.clustering}
    which = "; ".join(f"{name} (by {', '.join(dims)})" for name, dims in shared.items() if dims)
    if not which:
        return ""
    return (f"The joint tests' refitted draws resample '{grid.resample}' (joint_inference.resample), and these "
            f"clustering choices keep the copies of a drawn '{grid.resample}' in one cluster: {which}. A draw then "
            "counts the copies as perfectly correlated members of that cluster, so their specifications' draws get "
            "wider standard errors than the data's and the joint tests' p-values of the share significant and of "
            "Stouffer's Z come out too small. Resample the coarsest cluster variable (joint_inference.resample), or "
            "use joint_inference.method: linearized, or read those p-values with care (README, 'Clusters coarser "
            "than the resampled units').")


def resample_panel(frame: pd.DataFrame, column: str, unit: str, rng: np.random.Generator) -> pd.DataFrame:
    """Draw the levels of ``column`` with replacement and stack their rows.

    Every draw of a level becomes a new level (its position in the draw), and the units inside it
    are relabelled with that position, so that a unit drawn twice has two fixed effects.
    """
    codes, levels = pd.factorize(frame[column], sort=True)
    return stack_draw(frame, draw_levels(codes, len(levels), rng), column, unit)


def stack_draw(frame: pd.DataFrame, draw: Draw, column: str, unit: str) -> pd.DataFrame:
    """The stacked panel of a draw (see :func:`resample_panel`)."""
    out = frame.iloc[draw.rows].reset_index(drop=True)
    unit_codes = pd.factorize(out[unit], sort=True)[0]
    out[unit] = draw.position * (int(unit_codes.max()) + 1) + unit_codes
    if column != unit:
        out[column] = draw.position
    return out


def without_wild(request: SpecRequest) -> SpecRequest:
    """A draw needs the estimate, its SE and df only: a wild cluster bootstrap adds p-values and
    intervals that the joint tests never read (and cost a third of every draw's time)."""
    if request.inference.bootstrap is None:
        return request
    return replace(request, inference=replace(request.inference, bootstrap=None))


def draw_curves(grid: Grid, frame: pd.DataFrame, specs: Sequence[Spec], draws: Sequence[int], *,
                seed: int, column: str, reweight: bool = True) -> pd.DataFrame:
    """Refit ``specs`` on each bootstrap draw; one row per draw and specification.

    Least-squares, 2SLS, Poisson PML and (most) staggered-adoption specifications are refitted as
    reweightings of the data, or from the copies' arrays (:mod:`fegrid.reweight`), unless ``reweight`` is
    false; the others, and any block of a draw those shortcuts leave, are refitted on the draw's stacked
    panel.
    """
    rows: list[dict[str, Any]] = []
    all_blocks: dict[str, list[Spec]] = {}
    for spec in specs:
        all_blocks.setdefault(spec.block_key, []).append(spec)
    observed = _poisson_estimates(grid, frame, all_blocks)
    frame = frame.copy(deep=False)
    frame.attrs = {}  # pandas deep-copies attrs at every operation on every draw's copies
    for col in frame.columns:  # text keys as categories: every draw takes, filters and groups them cheaply
        if not pd.api.types.is_numeric_dtype(frame[col]) and not isinstance(frame[col].dtype, pd.CategoricalDtype):
            frame[col] = pd.Categorical(frame[col].astype(object),
                                        categories=sorted(frame[col].dropna().astype(object).unique(), key=str))
    codes, levels = pd.factorize(frame[column], sort=True)
    masks: dict[str, np.ndarray] = {}

    def in_sample(sample: SampleDef) -> np.ndarray:
        """The rows of the data in ``sample``: a draw's sample is their copies (not the filters applied
        again to the stacked panel, whose unit and resampling labels are the copies' positions)."""
        skey = repr(sample.canonical())
        if skey not in masks:
            mask = np.zeros(len(frame), dtype=bool)
            try:
                mask[sample_rows(frame, sample, grid.panel)] = True
            except FegridError:
                pass
            masks[skey] = mask
        return masks[skey]

    blocks, stacked = (prepare_blocks(grid, frame, specs, codes, len(levels), column, observed) if reweight
                       else ([], list(specs)))
    by_block: dict[str, list[Spec]] = {}
    for spec in stacked:
        by_block.setdefault(spec.block_key, []).append(spec)
    draws = list(draws)
    made: dict[int, tuple[Draw, list[list[dict[str, Any]] | None]]] = {}
    for j, d in enumerate(draws):
        if j % BATCH_DRAWS == 0:  # the next batch of draws: each reweighted block refits them together
            batch = draws[j: j + BATCH_DRAWS]
            drawn = [draw_levels(codes, len(levels), np.random.default_rng([seed, b])) for b in batch]
            refits = [block.refit_many(drawn) for block in blocks]
            made = {k: (drawn[k], [r[k] for r in refits]) for k in range(len(batch))}
        draw, refitted = made.pop(j % BATCH_DRAWS)
        boot: pd.DataFrame | None = None  # the stacked panel, made only when a block needs it
        samples: dict[str, pd.DataFrame | None] = {}
        todo = [by_block[k] for k in sorted(by_block)]
        for block, got in zip(blocks, refitted):
            if got is None:
                todo.append(block.specs)
            else:
                rows.extend({"draw": d, **r} for r in got)
        for block in todo:
            skey = repr(block[0].sample.canonical())
            if skey not in samples:
                chosen = in_sample(block[0].sample)[draw.rows]
                if boot is None and chosen.any():
                    boot = stack_draw(frame, draw, column, grid.panel.unit)
                samples[skey] = boot.loc[chosen] if boot is not None and chosen.any() else None
            part = samples[skey]
            if part is None:
                rows.extend({"draw": d, "spec_id": s.spec_id, "estimate": np.nan, "std_error": np.nan,
                             "df_inference": np.nan, "imposed": s.spec_id in observed} for s in block)
                continue
            requests = [without_wild(s.request()) for s in block]
            if any(s.spec_id in observed for s in block):
                part = part.copy(deep=False)
                for i, s in enumerate(block):
                    if s.spec_id in observed:
                        # specifications with the same estimate (other clusterings) share the column, and so
                        # the design's one Poisson fit
                        null_outcome = f"__null__{s.outcome}__{s.focal}__{observed[s.spec_id]!r}"
                        part[null_outcome] = (part[s.outcome].to_numpy(dtype=float)
                                              * np.exp(-observed[s.spec_id] * part[s.focal].to_numpy(dtype=float)))
                        requests[i] = replace(requests[i], outcome=null_outcome)
            fit = fit_block(part, grid.block_settings(block[0]), requests, coefficients=False, diagnostics=False)
            rows.extend({"draw": d, "spec_id": r.spec_id, "estimate": r.estimate, "std_error": r.std_error,
                         "df_inference": r.df_inference, "imposed": r.spec_id in observed} for r in fit.results)
    return pd.DataFrame(rows, columns=DRAW_COLUMNS)


def linearized_draws(grid: Grid, frame: pd.DataFrame, specs: Sequence[Spec], draws: Sequence[int], *,
                     seed: int, column: str) -> pd.DataFrame:
    """The first-order approximation of :func:`draw_curves` (see the module docstring): the same
    draws of the levels of ``column``, one fit of ``specs`` on the data; one row per draw and
    specification, with the observed df (NaN where the specification has no estimate on the data)."""
    frame = frame.reset_index(drop=True)
    codes, levels = pd.factorize(frame[column], sort=True)
    n_levels = len(levels)
    by_block: dict[str, list[Spec]] = {}
    for spec in specs:
        by_block.setdefault(spec.block_key, []).append(spec)
    ids: list[str] = []
    observed: list[tuple[float, float, float]] = []
    columns: list[np.ndarray] = []
    nan = float("nan")
    for key in sorted(by_block):
        block = by_block[key]
        try:
            positions = sample_rows(frame, block[0].sample, grid.panel)
        except FegridError:
            positions = None
        fit = None
        if positions is not None and len(positions):
            part = frame.iloc[positions]
            fit = fit_block(part, grid.block_settings(block[0]), [without_wild(s.request()) for s in block],
                            coefficients=False, influence=True, diagnostics=False)
        got = {r.spec_id: r for r in fit.results} if fit is not None else {}
        for spec in block:
            ids.append(spec.spec_id)
            r = got.get(spec.spec_id)
            if fit is None or r is None or r.status != STATUS_OK or spec.spec_id not in fit.influence:
                observed.append((nan, nan, nan))
                columns.append(np.zeros(n_levels))
                continue
            assert positions is not None
            where, psi = fit.influence[spec.spec_id]
            observed.append((r.estimate, r.std_error, r.df_inference))
            columns.append(np.bincount(codes[positions[where]], weights=psi, minlength=n_levels))
    influence = np.column_stack(columns) if columns else np.zeros((n_levels, 0))
    est, se, df = (np.array(v, dtype=float) for v in zip(*observed)) if observed else (np.zeros(0),) * 3
    draws = list(draws)
    counts = np.vstack([np.bincount(draw_picks(n_levels, np.random.default_rng([seed, d])), minlength=n_levels)
                        for d in draws]) if draws else np.zeros((0, n_levels))
    moved = est[None, :] + (counts - 1.0) @ influence
    # each draw's SE: the observed one scaled as the copies scale the sum of squared influences by level
    squares = influence**2
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.sqrt((counts @ squares) / squares.sum(axis=0)[None, :])
    k = len(ids)
    return pd.DataFrame({
        "draw": np.repeat(np.asarray(draws, dtype=np.int64), k),
        "spec_id": np.tile(np.asarray(ids, dtype=object), len(draws)),
        "estimate": moved.ravel(), "std_error": (se[None, :] * scale).ravel(),
        "df_inference": np.tile(df, len(draws)), "imposed": False,
    }, columns=DRAW_COLUMNS)


#: Columns of a chunk of bootstrap draws.
DRAW_COLUMNS = ["draw", "spec_id", "estimate", "std_error", "df_inference", "imposed"]


def _poisson_estimates(grid: Grid, frame: pd.DataFrame, by_block: dict[str, list[Spec]]) -> dict[str, float]:
    """The observed estimates of the Poisson PML specifications (their nulls are imposed on the data),
    refitted here, so that the draws do not wait for the ledger."""
    out: dict[str, float] = {}
    for block in by_block.values():
        wanted = {s.spec_id for s in block if s.estimator.method == POISSON}
        if not wanted:
            continue
        try:
            part = apply_sample(frame, block[0].sample, grid.panel)
        except FegridError:
            continue
        fit = fit_block(part, grid.block_settings(block[0]), [without_wild(s.request()) for s in block],
                        evaluate=wanted, coefficients=False)
        out.update({r.spec_id: r.estimate for r in fit.results if r.status == STATUS_OK})
    return out


def curve_statistics(estimate: np.ndarray, p_value: np.ndarray, dominant: float, alpha: float) -> dict[str, float]:
    """The three statistics of one curve (see the module docstring)."""
    ok = np.isfinite(estimate) & np.isfinite(p_value)
    est, p = estimate[ok], np.clip(p_value[ok], 1e-300, 1.0)
    if len(est) == 0:
        return dict.fromkeys(STATISTICS, np.nan)
    signs = np.where(np.sign(est) == dominant, 1.0, -1.0)
    return {
        "median_estimate": float(np.median(est)),
        "share_significant": float(np.mean((p < alpha) & (np.sign(est) == dominant))),
        "stouffer_z": float(np.sum(signs * -special.ndtri(p / 2)) / np.sqrt(len(est))),
    }


def _dominant(estimates: np.ndarray | pd.Series) -> float:
    """The curve's dominant sign: the sign of its median (+1 for a median of zero)."""
    values = np.asarray(estimates, dtype=float)
    values = values[np.isfinite(values)]
    return float(np.sign(np.median(values))) or 1.0 if len(values) else 1.0


def joint_tests(ledger: pd.DataFrame, draws: pd.DataFrame, level: float) -> pd.DataFrame:
    """Observed statistics and bootstrap p-values per outcome x focal pair.

    The p-value is the share of draws whose statistic, under the imposed null, is at least as
    extreme as the observed one. The direction is not fixed in advance: each curve, observed or
    drawn, is read in its own dominant direction (the median is compared in absolute value), so
    that choosing the direction after seeing the data does not halve the p-values.
    """
    alpha = 1.0 - level
    out = []
    fitted = ledger[ledger["status"] == STATUS_OK]
    for (outcome, focal, curve), part in fitted.groupby(PAIR, sort=True):
        obs_est = part["estimate"].to_numpy(dtype=float)
        dominant = _dominant(obs_est)
        observed = curve_statistics(obs_est, part["p_value"].to_numpy(dtype=float), dominant, alpha)
        merged = draws.merge(part[["spec_id", "estimate"]].rename(columns={"estimate": "observed"}),
                             on="spec_id", how="inner")
        imposed = merged["imposed"].fillna(False).astype(bool) if "imposed" in merged else False
        merged["centered"] = np.where(imposed, merged["estimate"], merged["estimate"] - merged["observed"])
        t = merged["centered"] / merged["std_error"]
        merged["p_null"] = 2 * special.stdtr(merged["df_inference"].to_numpy(dtype=float),
                                             -np.abs(t.to_numpy(dtype=float)))
        per_draw = pd.DataFrame([
            curve_statistics(g["centered"].to_numpy(), g["p_null"].to_numpy(), _dominant(g["centered"]), alpha)
            for _, g in merged.groupby("draw", sort=True)
        ])
        n_draws = len(per_draw)
        for stat in STATISTICS:
            sim = per_draw[stat].to_numpy(dtype=float) if n_draws else np.array([])
            sim = sim[np.isfinite(sim)]
            if stat == "median_estimate":
                extreme = np.abs(sim) >= abs(observed[stat])
            else:
                extreme = sim >= observed[stat]
            out.append({
                "outcome": outcome, "focal": focal, "curve": curve, "statistic": stat, "observed": observed[stat],
                "p_value": float(extreme.mean()) if len(sim) else float("nan"),
                "draws": int(len(sim)), "specs": int(len(part)),
                "dominant_sign": "+" if dominant > 0 else "-",
            })
    return pd.DataFrame(out, columns=["outcome", "focal", "curve", "statistic", "observed", "p_value", "draws", "specs",
                                      "dominant_sign"])
