"""Staggered adoption of a binary treatment: diagnostics of the two-way estimate and estimators
that stay valid when effects differ across cohorts and over time.

A unit *adopts* the treatment in its first treated period and stays treated (absorbing treatment).
Units adopting in the same period form a *cohort*; units never treated in the sample are the
never-treated; untreated observations of units that adopt later are not-yet-treated. Periods are
the positions ``0..T-1`` of the sorted time values of the rows at hand; a unit's *relative period*
is its period less its cohort's.

What is here (pure functions of arrays; :mod:`fegrid.estimate` wires them to specifications):

* :func:`bacon_decomposition`, Goodman-Bacon (2021), Theorem 1: on a balanced panel without
  controls, the two-way estimate is a weighted average of every 2x2 difference in differences
  (earlier vs later adopters before the later adopt, later vs earlier adopters after the earlier
  adopted, adopters vs never-treated) with weights that sum to one.
* :func:`negative_weights`, de Chaisemartin & D'Haultfoeuille (2020), Theorem 1 and Corollary 1:
  the two-way estimate is ``sum_{D=1} w_it Delta_it`` (weights proportional to the residual of the
  treatment on the absorbed effects and controls); the count and sum of negative weights and the
  smallest standard deviation of effects under which the average effect could have the other sign.
* :func:`event_indicators`: relative-period indicators with a declared window (end points binned)
  and reference period, for the two-way event study.
* :func:`interaction_cells`: the cohort x relative-period indicators of the interaction-weighted
  estimator of Sun & Abraham (2021), and :func:`interaction_weights` its aggregation.
* :func:`imputation`: the imputation estimator of Borusyak, Jaravel & Spiess (2024): effects fitted on
  untreated observations, counterfactuals imputed for treated ones, averaged; variance from their
  Theorem 3 (residuals of treated observations taken from cohort x relative-period means).
* :func:`group_time`: the group-time average effects of Callaway & Sant'Anna (2021) without
  covariates (never-treated or not-yet-treated controls, universal base period ``g - 1``),
  aggregated overall, by relative period and by cohort, with influence functions (including the
  estimated aggregation weights) and a multiplier bootstrap for uniform bands over relative periods.

Every estimator here is linear in the outcome given the design: an estimate is ``sum_i v_i y_i``,
and its cluster-robust variance is ``G/(G-1) sum_g (sum_{i in g} v_i e_i)^2`` for residuals ``e``
(the fewest clusters less one are the t distribution's df, as for the other estimators).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import pandas as pd

from .absorb import DENSE_CELLS, DIRECT_MAX_LEVELS, _pinv
from .covariance import cluster_sums
from .errors import ConfigError, DataError

__all__ = [
    "STAGGERED_METHODS",
    "EVENT_STUDY",
    "INTERACTION_WEIGHTED",
    "IMPUTATION",
    "GROUP_TIME",
    "CONTROL_GROUPS",
    "StaggeredOptions",
    "Cohorts",
    "cohorts_of",
    "check_absorbing",
    "bacon_decomposition",
    "NegativeWeights",
    "negative_weights",
    "event_indicators",
    "interaction_cells",
    "interaction_weights",
    "share_covariance",
    "share_influence",
    "LinearEstimates",
    "imputation",
    "imputation_pieces",
    "ImputationPieces",
    "group_time",
    "wald_p_value",
    "term_of",
]

EVENT_STUDY = "event_study"
INTERACTION_WEIGHTED = "interaction_weighted"
IMPUTATION = "imputation"
GROUP_TIME = "group_time"
#: The estimator dimension's methods for staggered adoption.
STAGGERED_METHODS: tuple[str, ...] = (EVENT_STUDY, INTERACTION_WEIGHTED, IMPUTATION, GROUP_TIME)
#: Who serves as control: never-treated units, units not yet treated, or the last cohort to adopt.
CONTROL_GROUPS: tuple[str, ...] = ("never_treated", "not_yet_treated", "last_adopters")


@dataclass(frozen=True)
class StaggeredOptions:
    """The event window ``[first, last]`` (end points binned by the two-way event study), the
    reference period left out, the control group and the multiplier bootstrap's draws."""

    first: int = -4
    last: int = 4
    reference: int = -1
    control: str = "never_treated"  # imputation's default is not_yet_treated (see parse_options)
    draws: int = 999

    def canonical(self) -> dict[str, object]:
        return {"window": [self.first, self.last], "reference": self.reference, "control": self.control,
                "draws": self.draws}

    def relative_periods(self) -> list[int]:
        return [k for k in range(self.first, self.last + 1) if k != self.reference]


def parse_options(where: str, body: dict[str, object], method: str) -> StaggeredOptions:
    """The options of a staggered-adoption estimator choice (already checked against the schema)."""
    default = StaggeredOptions()  # the defaults' one home (the schema's descriptions quote them)
    window = body.get("window") or [default.first, default.last]
    first, last = (int(v) for v in window)  # type: ignore[union-attr]
    reference = int(body.get("reference", default.reference))  # type: ignore[call-overload]
    default_control = "not_yet_treated" if method == IMPUTATION else "never_treated"
    control = str(body.get("controls_from") or default_control)
    if not first < 0 <= last:
        raise ConfigError(f"{where}: window [{first}, {last}] must start before 0 and end at or after 0 "
                          "(relative period 0 is the first treated period).")
    if not first <= reference < 0:
        raise ConfigError(f"{where}: reference period {reference} must be a negative period inside the window "
                          f"[{first}, {last}].")
    allowed = {EVENT_STUDY: ("never_treated",), INTERACTION_WEIGHTED: ("never_treated", "last_adopters"),
               IMPUTATION: ("not_yet_treated",), GROUP_TIME: ("never_treated", "not_yet_treated")}[method]
    if control not in allowed:
        raise ConfigError(f"{where}: controls_from '{control}' is not available for method {method}; "
                          f"choose one of: {', '.join(allowed)}.")
    draws = int(body.get("uniform_band_draws", default.draws))  # type: ignore[call-overload]
    return StaggeredOptions(first, last, reference, control, draws)


def term_of(kind: str, value: float) -> str:
    """The coefficient-table name of a relative period (``kind='rel'``) or a cohort (``'cohort'``, named by
    its adoption period's time value)."""
    return f"{kind}={int(value):+d}" if kind == "rel" else f"{kind}={period_label(value)}"


def period_label(value: float) -> str:
    """A time value as text: whole numbers without a decimal point."""
    return str(int(value)) if float(value).is_integer() else f"{value:g}"


# ---- the design ------------------------------------------------------------------------------------

class Cohorts(NamedTuple):
    """The adoption design of a set of rows.

    ``cohort`` is each row's unit's adoption period (position; ``nan`` when the unit is not treated in
    these periods; ``<= 0`` when it is treated from its first period); ``period`` each row's period.
    """

    unit: np.ndarray  # (n,) unit codes 0..U-1
    period: np.ndarray  # (n,) period positions 0..T-1
    cohort: np.ndarray  # (n,) float
    labels: np.ndarray  # the sorted time values of positions 0..T-1
    treated: np.ndarray  # (n,) bool

    @property
    def relative(self) -> np.ndarray:
        return self.period - self.cohort

    def counts(self) -> dict[str, int]:
        """Cohorts adopting inside the periods, never-treated units, units treated throughout,
        and not-yet-treated observations (untreated rows of units that adopt later)."""
        first = pd.Series(self.cohort).groupby(self.unit).first().to_numpy()
        inside = first[np.isfinite(first) & (first > 0)]
        return {"cohorts": len(np.unique(inside)), "never_treated_units": int(np.count_nonzero(~np.isfinite(first))),
                "always_treated_units": int(np.count_nonzero(np.isfinite(first) & (first <= 0))),
                "not_yet_treated_obs": int(np.count_nonzero(np.isfinite(self.cohort) & ~self.treated))}


def check_absorbing(frame: pd.DataFrame, unit: str, time: str, treatment: str) -> None:
    """Raise a :class:`DataError` when ``treatment`` is not 0/1 or a unit switches it off."""
    d = frame[treatment]
    values = pd.unique(d.dropna())
    if not set(values.tolist()) <= {0, 1}:
        raise DataError(f"data.treatment: the column '{treatment}' must hold 0 and 1 only (it has "
                        f"{sorted(map(str, values.tolist()))[:5]}).")
    ordered = frame[[unit, time, treatment]].dropna().sort_values([unit, time])
    was = ordered.groupby(unit, sort=False)[treatment].cummax()
    off = ordered.loc[was.to_numpy() > ordered[treatment].to_numpy()]
    if len(off):
        row = off.iloc[0]
        raise DataError(
            f"data.treatment: unit {shown(row[unit])} switches '{treatment}' off in period {shown(row[time])} after "
            f"being treated ({len(off)} such observation(s) in all). Staggered-adoption estimators need a "
            "treatment that stays on once adopted; code the first adoption period in data.adoption, or drop "
            "the units that switch off with a sample filter.")


def shown(value: object) -> str:
    """A data value as an error message shows it: numbers plainly (no numpy type), text quoted."""
    value = value.item() if isinstance(value, np.generic) else value
    if isinstance(value, float) and value.is_integer():
        value = int(value)
    return repr(value) if isinstance(value, str) else str(value)


def cohorts_of(unit: np.ndarray, time: np.ndarray, *, treatment: np.ndarray | None = None,
               adoption: np.ndarray | None = None) -> Cohorts:
    """The adoption design of rows from their unit and time values and either the 0/1 ``treatment``
    (adoption = a unit's first treated period among these rows) or the ``adoption`` period (a time
    value; missing for never treated; ``treatment`` is then ``time >= adoption``)."""
    codes, _ = pd.factorize(unit, sort=True)
    labels, period = np.unique(np.asarray(time, dtype=float), return_inverse=True)
    period = period.ravel().astype(float)
    if adoption is not None:
        a = np.asarray(adoption, dtype=float)
        pos = np.searchsorted(labels, a, side="left").astype(float)
        pos[a < labels[0]] = -1.0  # adopted before the first period: treated throughout
        pos[~np.isfinite(a) | (a > labels[-1])] = np.nan
        per_unit = pd.Series(pos).groupby(codes).min().to_numpy()
        cohort = per_unit[codes]
    else:
        assert treatment is not None
        d = np.asarray(treatment, dtype=float)
        first = pd.Series(np.where(d > 0.5, period, np.inf)).groupby(codes).min().to_numpy().copy()
        first[~np.isfinite(first)] = np.nan
        start = pd.Series(period).groupby(codes).min().to_numpy()
        first = np.where(first <= start, -1.0, first)  # treated from its first row: treated throughout
        cohort = first[codes]
    treated = np.isfinite(cohort) & (period >= cohort)
    return Cohorts(codes.astype(np.int64), period, cohort, labels, treated)


# ---- Goodman-Bacon (2021) --------------------------------------------------------------------------

def bacon_decomposition(y: np.ndarray, design: Cohorts) -> pd.DataFrame:
    """Every 2x2 comparison of the two-way estimate with its estimate and weight.

    Goodman-Bacon (2021), Theorem 1, for a balanced panel without controls or weights. Columns:
    ``comparison`` (``earlier_vs_later``: earlier adopters against later ones before these adopt;
    ``later_vs_earlier``: later adopters against earlier ones after these adopted, the comparisons
    that use already-treated units as controls; ``treated_vs_never``), ``treated`` and ``control``
    (the time value of each group's adoption, or ``never``/``always``), ``estimate``, ``weight``.
    The weight of a comparison is ``(share of units x share of periods)^2`` of its subsample times
    the variance of the two-way demeaned treatment in it, over that variance in the whole panel.

    Raises ``ValueError`` when the panel is not balanced (each unit once in every period).
    """
    u, t = design.unit, design.period.astype(np.int64)
    n_units, n_periods = int(u.max()) + 1, int(t.max()) + 1
    if len(y) != n_units * n_periods or np.unique(u * n_periods + t).size != len(y):
        raise ValueError("the decomposition needs a balanced panel (every unit once in every period)")
    ymat = np.empty((n_units, n_periods))
    ymat[u, t] = y
    start = pd.Series(design.cohort).groupby(u).first().to_numpy()
    group = np.where(np.isfinite(start), np.clip(start, 0, None), n_periods).astype(np.int64)  # T = never
    dmat = (np.arange(n_periods)[None, :] >= group[:, None]).astype(float)
    dd = dmat - dmat.mean(axis=1, keepdims=True) - dmat.mean(axis=0, keepdims=True) + dmat.mean()
    var_d = float((dd ** 2).mean())
    sizes = np.bincount(group, minlength=n_periods + 1) / n_units
    means = {g: ymat[group == g].mean(axis=0) for g in np.unique(group)}

    def label(g: int) -> str:
        return "never" if g >= n_periods else "always" if g == 0 else period_label(design.labels[g])

    rows = []

    def add(kind: str, treated: int, control: int, window: slice, before: slice, after: slice) -> None:
        span = np.arange(n_periods)[window]
        share_t = len(span) / n_periods
        d = (after.stop - after.start if after.stop is not None else n_periods - after.start) / len(span)
        a = sizes[treated] / (sizes[treated] + sizes[control])
        weight = ((sizes[treated] + sizes[control]) * share_t) ** 2 * a * (1 - a) * d * (1 - d) / var_d
        change = [means[g][after].mean() - means[g][before].mean() for g in (treated, control)]
        rows.append({"comparison": kind, "treated": label(treated), "control": label(control),
                     "estimate": change[0] - change[1], "weight": weight})

    timing = [g for g in sizes.nonzero()[0] if 0 < g < n_periods]
    if sizes[n_periods] > 0:
        for k in timing:
            add("treated_vs_never", k, n_periods, slice(0, n_periods), slice(0, k), slice(k, n_periods))
    earlier = ([0] if sizes[0] > 0 else []) + timing
    for k in earlier:
        for m in timing:
            if m <= k:
                continue
            if k > 0:
                add("earlier_vs_later", k, m, slice(0, m), slice(0, k), slice(k, m))
            add("later_vs_earlier", m, k, slice(k, n_periods), slice(k, m), slice(m, n_periods))
    return pd.DataFrame(rows, columns=["comparison", "treated", "control", "estimate", "weight"])


# ---- de Chaisemartin & D'Haultfoeuille (2020) --------------------------------------------------------

class NegativeWeights(NamedTuple):
    """The weights of the two-way estimate on the treated observations' effects."""

    count: int  # treated observations with a negative weight
    total: float  # the sum of the negative weights (the weights sum to one)
    sign_flip_sd: float  # smallest SD of effects compatible with the estimate and an average effect of 0


def negative_weights(contribution: np.ndarray, treated: np.ndarray, estimate: float,
                     shares: np.ndarray | None = None) -> NegativeWeights:
    """de Chaisemartin & D'Haultfoeuille (2020): with ``y = effects + D Delta``, the two-way estimate
    is ``sum_{D=1} c_i Delta_i`` where ``c = X (X'X)^{-1} e_1`` is each observation's contribution
    (``contribution``, the residual of the treatment on the absorbed effects and controls over its
    sum of squares). With shares ``p_i`` of the treated observations (equal by default) and
    normalised weights ``w_i = c_i / p_i`` (mean one), Corollary 1 gives
    ``sigma_fe = |beta| / sqrt(sum p_i (w_i - 1)^2)``."""
    c = contribution[treated]
    p = np.full(len(c), 1 / max(len(c), 1)) if shares is None else shares[treated] / shares[treated].sum()
    w = c / p
    spread = math.sqrt(float((p * (w - 1) ** 2).sum()))
    return NegativeWeights(int(np.count_nonzero(c < 0)), float(c[c < 0].sum()),
                           abs(estimate) / spread if spread > 0 else float("inf"))


# ---- indicator designs -------------------------------------------------------------------------------

def event_indicators(design: Cohorts, options: StaggeredOptions) -> tuple[np.ndarray, list[str]]:
    """Relative-period indicators for the window (end points binned: earlier periods count as the first,
    later as the last), the reference period left out; rows of never-treated units are all zero."""
    rel = design.relative
    binned = np.clip(rel, options.first, options.last)
    ks = options.relative_periods()
    x = np.column_stack([np.isfinite(rel) & (binned == k) for k in ks]).astype(float)
    return x, [term_of("rel", k) for k in ks]


class Cells(NamedTuple):
    """The cohort x relative-period indicators of the interaction-weighted estimator."""

    rows: np.ndarray  # (n,) bool: rows kept (units treated throughout and, with the last adopters as
    #                   controls, periods from their adoption on are dropped)
    matrix: np.ndarray  # (kept rows, cells)
    cells: list[tuple[int, int]]  # (cohort position, relative period)
    counts: np.ndarray  # observations per cell
    names: list[str]


def interaction_cells(design: Cohorts, options: StaggeredOptions) -> Cells:
    """Sun & Abraham (2021): an indicator for every cohort and relative period except the reference,
    saturated (no binning). Controls are the never-treated units, or the last cohort to adopt (its
    periods from adoption on, and every unit's, dropped)."""
    cohort, rel = design.cohort, design.relative
    rows = ~(np.isfinite(cohort) & (cohort <= 0))
    control_cohort = np.nan
    if options.control == "last_adopters":
        inside = np.unique(cohort[rows & np.isfinite(cohort)])
        if len(inside) < 2:
            raise ValueError("the last adopters as controls need at least two cohorts")
        control_cohort = float(inside[-1])
        rows &= design.period < control_cohort
    elif not np.any(rows & ~np.isfinite(cohort)):
        raise ValueError("there are no never-treated units in this sample (take the last adopters as "
                         "controls: controls_from: last_adopters)")
    active = rows & np.isfinite(cohort) & (cohort != control_cohort) & (rel != options.reference)
    kept = np.flatnonzero(rows)
    on = active[kept]
    # the (cohort, relative period) cells in lexicographic order: one integer key per row
    c_on, r_on = cohort[kept][on].astype(np.int64), rel[kept][on].astype(np.int64)
    r_low = int(r_on.min()) if len(r_on) else 0
    span = int(r_on.max()) - r_low + 1 if len(r_on) else 1
    keys, cell_codes = np.unique(c_on * span + (r_on - r_low), return_inverse=True)
    cell_codes = cell_codes.ravel()
    pairs = [(int(k // span), int(k % span) + r_low) for k in keys]
    matrix = np.zeros((len(kept), len(pairs)))
    matrix[np.flatnonzero(on), cell_codes] = 1.0
    counts = np.bincount(cell_codes, minlength=len(pairs)).astype(float)
    names = [f"{term_of('cohort', design.labels[c])},{term_of('rel', r)}" for c, r in pairs]
    return Cells(rows, matrix, pairs, counts, names)


def interaction_weights(cells: Cells, options: StaggeredOptions) -> tuple[np.ndarray, list[str]]:
    """The aggregation matrix of the interaction-weighted estimator (rows: the overall effect, then each
    relative period of the window but the reference): each relative period averages its cohorts'
    coefficients weighted by their observations (the cohort shares of Sun & Abraham 2021); the overall
    effect averages every cell from relative period 0 on, weighted by its observations (the average
    effect on the treated observations)."""
    rel = np.array([r for _, r in cells.cells])
    rows, names = [], []
    post = (rel >= 0).astype(float) * cells.counts
    rows.append(post / post.sum() if post.sum() > 0 else post)
    names.append("overall")
    for k in options.relative_periods():
        w = (rel == k) * cells.counts
        if w.sum() > 0:
            rows.append(w / w.sum())
            names.append(term_of("rel", k))
    return np.vstack(rows), names


def share_influence(cells: Cells, aggregation: np.ndarray, coefficients: np.ndarray) -> np.ndarray:
    """Each observation's first-order influence, through the estimated cohort shares, on the
    interaction-weighted aggregates (Sun & Abraham 2021 count it), ``(observations, aggregates)``:
    aggregate ``a`` averages the cells of its support ``S_a`` weighted by their observations, so an
    observation in cell ``c`` moves it by ``(delta_c - theta_a) / M_a`` (``M_a``: the observations in
    ``S_a``)."""
    theta = aggregation @ coefficients
    support = aggregation > 0
    total = (support * cells.counts).sum(axis=1)
    spread = support.T * (coefficients[:, None] - theta[None, :]) / np.maximum(total, 1)[None, :]
    return cells.matrix @ spread


def share_covariance(cells: Cells, aggregation: np.ndarray, coefficients: np.ndarray,
                     clusters: np.ndarray) -> np.ndarray:
    """The variance the estimated cohort shares add to the interaction-weighted aggregates: the
    influence of :func:`share_influence` summed by cluster, with ``G/(G-1)``. It is uncorrelated with
    the coefficients' own error (a regression score has mean zero given the cohort), so the two
    variances add."""
    first = share_influence(cells, aggregation, coefficients)
    cov, _ = _cluster_covariance(first, np.ones(len(first)), clusters)
    return cov


# ---- estimates linear in the outcome -------------------------------------------------------------------

@dataclass(frozen=True)
class LinearEstimates:
    """Named estimates (the overall effect first) with their cluster-robust covariance."""

    names: tuple[str, ...]
    estimates: np.ndarray
    covariance: np.ndarray
    df: float
    n_clusters: int
    n_obs: int
    message: str = ""
    uniform_critical: float = float("nan")
    pretrend_p_value: float = float("nan")
    #: each observation's first-order influence on the overall estimate (the order of the outcome given)
    influence: np.ndarray | None = None


def _cluster_covariance(v: np.ndarray, e: np.ndarray, clusters: np.ndarray) -> tuple[np.ndarray, int]:
    """``G/(G-1) sum_g s_g s_g'`` with ``s_g = sum_{i in g} v_i e_i`` for each column of ``v`` (n, q)."""
    sums, g = cluster_sums(v * e[:, None], pd.factorize(clusters)[0])
    return sums.T @ sums * (g / (g - 1) if g > 1 else float("nan")), g


def wald_p_value(estimates: np.ndarray, covariance: np.ndarray, df: float) -> float:
    """The p-value of the Wald test that every estimate is zero (F with ``q`` and ``df`` df)."""
    from scipy.special import fdtrc

    q = len(estimates)
    if q == 0:
        return float("nan")
    try:
        stat = float(estimates @ np.linalg.solve(covariance, estimates)) / q
    except np.linalg.LinAlgError:
        return float("nan")
    return float(fdtrc(q, df, stat)) if np.isfinite(df) and df > 0 else float("nan")


def _group_solve(codes: list[np.ndarray], sizes: list[int], x: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """``Z g`` for a solution ``g`` of ``Z'Z g = rhs`` with ``Z = [dummies of each code, x]`` (a consistent,
    possibly singular system; ``Z g`` is the same for every solution).

    With two codes of which the smaller has at most :data:`fegrid.absorb.DIRECT_MAX_LEVELS` levels (a
    panel's units and periods), solved directly: the large code's dummies are eliminated (their block is
    diagonal), leaving the small code's levels and ``x`` in a small dense system (the Schur complement),
    whose pseudo-inverse (scaled to a unit diagonal) solves it; the ``x`` part of that system is built
    from ``x`` demeaned within the large code's levels, not by subtracting cross products. Otherwise, by
    conjugate gradients (:func:`_group_cg`)."""
    if len(codes) != 2 or min(sizes) > DIRECT_MAX_LEVELS or sizes[0] * sizes[1] > DENSE_CELLS:
        return _group_cg(codes, sizes, x, rhs)
    big = 0 if sizes[0] >= sizes[1] else 1
    ca, cb = codes[big], codes[1 - big]
    na, nb = sizes[big], sizes[1 - big]
    split = np.cumsum([0, *sizes])
    ra, rb, rc = rhs[split[big]:split[big + 1]], rhs[split[1 - big]:split[2 - big]], rhs[split[2]:]
    count_a = np.bincount(ca, minlength=na).astype(float)
    inv_a = np.divide(1.0, count_a, out=np.zeros(na), where=count_a > 0)
    table = np.bincount(ca * nb + cb, minlength=na * nb).reshape(na, nb).astype(float)
    p = x.shape[1]
    sums_a = np.column_stack([np.bincount(ca, x[:, j], minlength=na) for j in range(p)]) if p else np.zeros((na, 0))
    means_a = sums_a * inv_a[:, None]
    within = x - means_a[ca]  # x demeaned within the large code's levels
    m = nb + p
    system = np.empty((m, m))
    system[:nb, :nb] = np.diag(np.bincount(cb, minlength=nb).astype(float)) - table.T @ (table * inv_a[:, None])
    if p:
        cross = np.column_stack([np.bincount(cb, within[:, j], minlength=nb) for j in range(p)])
        system[:nb, nb:], system[nb:, :nb], system[nb:, nb:] = cross, cross.T, within.T @ within
    reduced = np.vstack([rb - table.T @ (ra * inv_a[:, None]), rc - means_a.T @ ra])
    scale = np.sqrt(np.clip(np.diag(system), 0.0, None))
    scale = np.where(scale > 0, scale, 1.0)
    solution = (_pinv(system / np.outer(scale, scale)) @ (reduced / scale[:, None])) / scale[:, None]
    gb, gc = solution[:nb], solution[nb:]
    ga = inv_a[:, None] * (ra - table @ gb - sums_a @ gc)
    return ga[ca] + gb[cb] + x @ gc


def _group_cg(codes: list[np.ndarray], sizes: list[int], x: np.ndarray, rhs: np.ndarray,
              tolerance: float = 1e-13, max_iterations: int = 10_000) -> np.ndarray:
    """Solve ``Z'Z g = rhs`` for ``Z = [dummies of each code, x]`` (a consistent, possibly singular
    system) by conjugate gradients preconditioned with the diagonal of ``Z'Z`` (the level counts),
    each column of ``rhs`` until its residual falls below ``tolerance`` times its norm; returns ``Z g``."""
    n = len(codes[0]) if codes else len(x)
    counts = [np.bincount(c, minlength=s).astype(float) for c, s in zip(codes, sizes)]
    diag = np.concatenate([*counts, (x * x).sum(axis=0)])
    inv = np.where(diag > 0, 1.0 / np.maximum(diag, 1e-300), 0.0)[:, None]
    split = np.cumsum([0, *sizes])

    def apply(g: np.ndarray) -> np.ndarray:
        out = x @ g[split[-1]:] if x.shape[1] else np.zeros((n, g.shape[1]))
        for j, c in enumerate(codes):
            out += g[split[j]:split[j + 1]][c]
        return out

    def apply_t(r: np.ndarray) -> np.ndarray:
        parts = [np.stack([np.bincount(c, r[:, k], minlength=s) for k in range(r.shape[1])], axis=1)
                 for c, s in zip(codes, sizes)]
        parts.append(x.T @ r)
        return np.vstack(parts)

    g = np.zeros_like(rhs)
    r = rhs.copy()
    z = inv * r
    p = z.copy()
    rz = (r * z).sum(axis=0)
    goal = tolerance * np.linalg.norm(rhs, axis=0)
    active = np.linalg.norm(r, axis=0) > goal
    for _ in range(max_iterations):
        if not active.any():
            break
        a = np.flatnonzero(active)
        pa = p[:, a]
        ap = apply_t(apply(pa))
        curvature = (pa * ap).sum(axis=0)
        alpha = np.where(curvature > 0, rz[a] / np.where(curvature > 0, curvature, 1.0), 0.0)
        g[:, a] += pa * alpha
        r[:, a] -= ap * alpha
        z_a = inv * r[:, a]
        rz_new = (r[:, a] * z_a).sum(axis=0)
        p[:, a] = z_a + pa * (rz_new / np.where(rz[a] > 0, rz[a], 1.0))
        rz[a] = rz_new
        active[a] = (np.linalg.norm(r[:, a], axis=0) > goal[a]) & (curvature > 0)
    return apply(g)


def _fitted_effects(codes: list[np.ndarray], sizes: list[int], fitted: np.ndarray,
                    tolerance: float = 1e-13, max_sweeps: int = 100_000) -> list[np.ndarray]:
    """Values of each effect (level by level) whose sum is ``fitted`` (a sum of effects on these rows),
    found by backfitting; one effect is pinned by the others' normalisation."""
    effects = [np.zeros(s) for s in sizes]
    rest = fitted.copy()
    counts = [np.maximum(np.bincount(c, minlength=s), 1) for c, s in zip(codes, sizes)]
    scale = max(float(np.abs(fitted).max()), 1e-300)
    for _ in range(max_sweeps):
        change = 0.0
        for j, (c, s) in enumerate(zip(codes, sizes)):
            step = np.bincount(c, rest, minlength=s) / counts[j]
            effects[j] += step
            rest -= step[c]
            change = max(change, float(np.abs(step).max()))
        if change <= tolerance * scale:
            break
    return effects


@dataclass(frozen=True)
class ImputationPieces:
    """The imputation estimates with their weights on the outcome (``v``, one column per estimate) and
    the residuals of Theorem 3; :meth:`with_clusters` adds the cluster-robust covariance."""

    names: tuple[str, ...]
    estimates: np.ndarray
    v: np.ndarray
    e: np.ndarray
    n_obs: int
    message: str
    pretrend: _PretrendPieces | None = None
    influence: np.ndarray | None = None  # each observation's first-order influence on the overall estimate

    def with_clusters(self, clusters: np.ndarray) -> LinearEstimates:
        cov, g = _cluster_covariance(self.v, self.e, clusters)
        pre = self.pretrend.p_value(clusters) if self.pretrend is not None else float("nan")
        return LinearEstimates(self.names, self.estimates, cov, float(g - 1), g, self.n_obs, self.message,
                               pretrend_p_value=pre, influence=self.influence)


@dataclass(frozen=True)
class _PretrendPieces:
    """The test of parallel trends of Borusyak, Jaravel & Spiess (2024): least squares on the untreated
    observations of the outcome on the absorbed effects, the controls and indicators of the window's
    pre-adoption periods (the absorbed effects partialled out of every column); the indicators' joint
    Wald test, clustered."""

    regressors: np.ndarray  # (untreated rows, q + controls): the indicators first
    residuals: np.ndarray
    bread: np.ndarray
    coefficients: np.ndarray
    q: int
    rows: np.ndarray  # positions of the untreated rows

    def p_value(self, clusters: np.ndarray) -> float:
        scores, g = _cluster_covariance(self.regressors, self.residuals, clusters[self.rows])
        cov = self.bread @ scores @ self.bread
        return wald_p_value(self.coefficients[: self.q], cov[: self.q, : self.q], float(g - 1))


def imputation(y: np.ndarray, design: Cohorts, effect_codes: list[np.ndarray], controls: np.ndarray,
               clusters: np.ndarray, options: StaggeredOptions) -> LinearEstimates:
    """The imputation estimates with their clustered covariance (see :func:`imputation_pieces`)."""
    return imputation_pieces(y, design, effect_codes, controls, options).with_clusters(clusters)


def imputation_pieces(y: np.ndarray, design: Cohorts, effect_codes: list[np.ndarray], controls: np.ndarray,
                      options: StaggeredOptions, *, pretrend: bool = True, per_period: bool = True) -> ImputationPieces:
    """Borusyak, Jaravel & Spiess (2024): the average effect on the treated observations (and on those of
    each relative period of the window, not binned) from counterfactuals imputed with the absorbed
    effects and controls fitted on the untreated observations only.

    Treated observations whose effect levels never appear untreated cannot be imputed and are left
    out (the message counts them). The variance is their Theorem 3's, clustered: each estimate is
    ``sum_i v_i y_i`` with ``v`` the treated observations' averaging weights and, on untreated
    observations, ``-Z_0 (Z_0'Z_0)^- Z_1' v_1``; residuals are the untreated fit's on untreated
    observations and the imputed effect less its cohort x relative-period mean on treated ones.
    ``pretrend``: also prepare their test of parallel trends; ``per_period``: also the estimates of each
    relative period (the joint tests' draws, which read the overall estimate, leave both out: the same
    overall estimate and variance, whose weights ``v`` are solved for column by column).
    """
    treated = design.treated
    untreated = ~treated
    n = len(y)
    dense = [pd.factorize(c[untreated], sort=True) for c in effect_codes]
    sizes = [len(u) for _, u in dense]
    # treated rows whose levels all occur among untreated rows can be imputed
    lookup = [pd.Index(u).get_indexer(c) for (_, u), c in zip(dense, effect_codes)]
    imputable = treated & np.all(np.column_stack([lk >= 0 for lk in lookup]), axis=1) if lookup else treated
    left_out = int(np.count_nonzero(treated & ~imputable))
    codes0 = [lk[untreated].astype(np.int64) for lk in lookup]
    x0 = controls[untreated]
    y0 = y[untreated]
    # least squares on the untreated rows: controls' coefficients by Frisch-Waugh-Lovell, then the effects
    if x0.shape[1]:
        resid_x = x0 - _group_solve(codes0, sizes, np.zeros((len(y0), 0)), _sums(codes0, sizes, x0))
        resid_y = y0 - _group_solve(codes0, sizes, np.zeros((len(y0), 0)), _sums(codes0, sizes, y0[:, None]))[:, 0]
        gamma = np.linalg.lstsq(resid_x, resid_y, rcond=None)[0]
    else:
        gamma = np.zeros(0)
    z = y0 - x0 @ gamma
    fitted0 = _group_solve(codes0, sizes, np.zeros((len(z), 0)), _sums(codes0, sizes, z[:, None]))[:, 0]
    effects = _fitted_effects(codes0, sizes, fitted0)
    rows1 = np.flatnonzero(imputable)
    y0_hat = controls[rows1] @ gamma + sum(e[lk[rows1]] for e, lk in zip(effects, lookup))
    tau = y[rows1] - y0_hat
    rel = design.relative[rows1]
    # averaging weights of each reported estimate on the treated rows
    names, weights = ["overall"], [np.full(len(rows1), 1 / max(len(rows1), 1))]
    for k in range(0, options.last + 1) if per_period else ():
        at = rel == k
        if at.any():
            names.append(term_of("rel", k))
            weights.append(at / at.sum())
    w1 = np.column_stack(weights)
    # implied weights on the untreated rows: -Z0 (Z0'Z0)^- Z1' w1
    z1_sums = _sums([lk[rows1] for lk in lookup], sizes, w1)
    if x0.shape[1]:
        z1_sums = np.vstack([z1_sums, controls[rows1].T @ w1])
    v0 = -_group_solve(codes0, sizes, x0, z1_sums)
    v = np.zeros((n, len(names)))
    v[rows1] = w1
    v[np.flatnonzero(untreated)] = v0
    e = np.zeros(n)
    e[untreated] = y0 - x0 @ gamma - fitted0
    # each imputed effect less its cohort x relative-period mean
    cell = tau
    if len(rows1):  # cohorts and relative periods are whole numbers of periods
        c1, r1 = design.cohort[rows1].astype(np.int64), rel.astype(np.int64)
        cells = pd.factorize((c1 - c1.min()) * (int(r1.max() - r1.min()) + 1) + (r1 - r1.min()))[0]
        cell = (np.bincount(cells, tau) / np.bincount(cells))[cells]
    e[rows1] = tau - cell
    estimates = w1.T @ tau
    # first order: an untreated row moves the imputed counterfactuals (v e), a treated one the average
    # of the imputed effects (its effect less the estimate, weighted by v); Theorem 3's residuals on
    # treated rows (less the cohort x period means) are a conservative variance's, not a derivative
    first = np.zeros(n)
    first[untreated] = v[untreated, 0] * e[untreated]
    first[rows1] = w1[:, 0] * (tau - estimates[0])
    message = (f"{left_out} treated observation(s) have effect levels never seen untreated and are left out"
               if left_out else "")
    test = (_imputation_pretrend(y0, x0, codes0, sizes, design.relative[untreated], np.flatnonzero(untreated),
                                 options) if pretrend else None)
    return ImputationPieces(tuple(names), estimates, v, e, int(untreated.sum() + len(rows1)), message, test, first)


def _imputation_pretrend(y0: np.ndarray, x0: np.ndarray, codes0: list[np.ndarray], sizes: list[int],
                         rel0: np.ndarray, rows: np.ndarray, options: StaggeredOptions) -> _PretrendPieces | None:
    """The pieces of the imputation estimator's test of parallel trends (``None`` when there is no
    pre-period indicator, or they are collinear with the absorbed effects)."""
    ks = [k for k in range(options.first, 0) if np.any(rel0 == k)]
    if not ks:
        return None
    regs = np.column_stack([*(np.where(np.isfinite(rel0) & (rel0 == k), 1.0, 0.0) for k in ks), x0])
    both = np.column_stack([y0, regs])
    resid = both - _group_solve(codes0, sizes, np.zeros((len(y0), 0)), _sums(codes0, sizes, both))
    r = resid[:, 1:]
    q_, r_ = np.linalg.qr(r)
    scale = np.abs(np.diag(r_))
    if scale.min() <= 1e-9 * max(scale.max(), 1e-300):
        return None
    r_inv = np.linalg.inv(r_)
    coefficients = r_inv @ (q_.T @ resid[:, 0])
    return _PretrendPieces(r, resid[:, 0] - r @ coefficients, r_inv @ r_inv.T, coefficients, len(ks), rows)


def _sums(codes: list[np.ndarray], sizes: list[int], values: np.ndarray) -> np.ndarray:
    """``Z' values`` for the dummies of each code (stacked), each column of ``values``."""
    return np.vstack([np.vstack([np.bincount(c, values[:, j], minlength=s) for j in range(values.shape[1])]).T
                      for c, s in zip(codes, sizes)])


def _balanced_units(design: Cohorts, y: np.ndarray,
                    clusters: np.ndarray) -> tuple[Cohorts, np.ndarray, np.ndarray, int, np.ndarray]:
    """The rows of units observed once in every period of ``design`` (renumbered), how many units
    were left out, and which rows are kept; ``ValueError`` when none is left or a unit has a period twice."""
    n_periods = int(design.period.max()) + 1
    if np.unique(design.unit * n_periods + design.period.astype(np.int64)).size != len(y):
        raise ValueError("group-time effects need each unit at most once per period")
    count = np.bincount(design.unit)
    full = count[design.unit] == n_periods
    left_out = int(np.count_nonzero((count > 0) & (count < n_periods)))
    if not full.any():
        raise ValueError("group-time effects need units observed in every period; none is")
    if left_out == 0:
        return design, y, clusters, 0, full
    unit = pd.factorize(design.unit[full], sort=True)[0].astype(np.int64)
    kept = Cohorts(unit, design.period[full], design.cohort[full], design.labels, design.treated[full])
    return kept, y[full], clusters[full], left_out, full


def group_time(y: np.ndarray, design: Cohorts, clusters: np.ndarray, options: StaggeredOptions,
               seed: int, level: float, covariates: np.ndarray | None = None, overall_only: bool = False
               ) -> tuple[LinearEstimates, pd.DataFrame]:
    """Callaway & Sant'Anna (2021), on the units observed in every period.

    ``ATT(g, t) = mean_{G=g}(Y_t - Y_{g-1}) - mean_C(Y_t - Y_{g-1})`` for every cohort ``g`` adopting
    inside the periods and every period ``t != g - 1`` (the base period is ``g - 1`` for pre-periods
    too), with ``C`` the never-treated units or the units not treated by ``max(t, g-1)`` (other than
    ``g``). Aggregations: overall (every post cell weighted by its cohort's size), by relative period
    (cohorts observed there weighted by size) and by cohort (mean over its post periods). Influence
    functions include the estimated weights; ``clusters`` must be constant within units. The uniform
    band's critical value over the window's relative periods comes from a multiplier bootstrap with
    Rademacher weights by cluster (``options.draws`` draws).

    With ``covariates`` (n, k), each ``ATT(g, t)`` takes the outcome-regression form (Sant'Anna & Zhao
    2020, as Callaway & Sant'Anna 2021 use it): ``mean_{G=g}(dY - X'b)`` with ``b`` the least-squares
    fit of ``dY`` on a constant and the covariates among the controls, the covariates taken in the base
    period ``g - 1``; its influence function counts the estimation of ``b``.

    Returns the aggregated estimates and the table of ``ATT(g, t)`` (cohort, period, relative,
    estimate, std_error). With ``overall_only`` (the joint tests' draws), the overall estimate alone,
    from the post-adoption cells alone, and no table.
    """
    if covariates is not None:  # carried through the balancing with the outcome
        y = np.column_stack([y, covariates])
    n_rows = len(y)
    design, y, clusters, left_out, kept_rows = _balanced_units(design, y, clusters)
    y, covariates = (y[:, 0], y[:, 1:]) if covariates is not None else (y, None)
    u, t = design.unit, design.period.astype(np.int64)
    n_units, n_periods = int(u.max()) + 1, int(t.max()) + 1
    ymat = np.empty((n_units, n_periods))
    ymat[u, t] = y
    xmat = None
    if covariates is not None:
        xmat = np.empty((n_units, n_periods, covariates.shape[1]))
        xmat[u, t] = covariates
    first_row = np.full(n_units, len(u))
    np.minimum.at(first_row, u, np.arange(len(u)))  # each unit's first row (cohorts are constant within units)
    start = design.cohort[first_row]
    group = np.where(np.isfinite(start), start, np.inf)
    unit_cluster = np.asarray(clusters)[first_row]
    if not np.array_equal(unit_cluster[u], np.asarray(clusters)):
        raise ValueError("the clusters of group-time effects must be constant within units")
    cohorts = [int(g) for g in np.unique(group[np.isfinite(group)]) if 0 < g < n_periods]
    if not cohorts:
        raise ValueError("no cohort adopts inside the sample's periods")
    p = np.array([(group == g).mean() for g in cohorts])
    cells, psi = [], []
    for gi, g in enumerate(cohorts):
        base = ymat[:, g - 1]
        mine = group == g
        for tt in range(n_periods):
            if tt == g - 1 or (overall_only and tt < g):
                continue
            if options.control == "never_treated":
                ctrl = ~np.isfinite(group)
            else:
                ctrl = (group > max(tt, g - 1)) & ~mine
            if not ctrl.any():
                continue
            dy = ymat[:, tt] - base
            if xmat is None:
                mu1, mu0 = dy[mine].mean(), dy[ctrl].mean()
                inf = mine * (dy - mu1) / mine.mean() - ctrl * (dy - mu0) / ctrl.mean()
                cells.append((gi, g, tt, mu1 - mu0))
                psi.append(inf / n_units)
                continue
            x = np.column_stack([np.ones(n_units), xmat[:, g - 1, :]])
            xc = x[ctrl]
            gram = xc.T @ xc
            if np.linalg.matrix_rank(gram) < x.shape[1]:
                raise ValueError(f"the covariates are collinear among the controls of cohort "
                                 f"{period_label(design.labels[g])} in period {period_label(design.labels[tt])}")
            b = np.linalg.solve(gram, xc.T @ dy[ctrl])
            resid = dy - x @ b
            att = resid[mine].mean()
            # sum_i psi_i: treated (resid - att) / n_1, less the fit's error moved through the treated mean of X
            lever = np.linalg.solve(gram, x[mine].mean(axis=0))
            psi.append(mine * (resid - att) / mine.sum() - ctrl * (x @ lever) * resid)
            cells.append((gi, g, tt, att))
    att = np.array([c[3] for c in cells])
    psi_m = np.column_stack(psi)  # (units, cells): estimate - truth ~ sum_i psi_i
    rel = np.array([c[2] - c[1] for c in cells])
    coh = np.array([c[0] for c in cells])
    # the estimated cohort shares' influence: p_g = mean(1{G=g})
    psi_p = np.column_stack([((group == g) - p[gi]) / n_units for gi, g in enumerate(cohorts)])

    def aggregate(selected: np.ndarray, by_size: bool) -> tuple[float, np.ndarray]:
        if not by_size:
            w = selected / selected.sum()
            return float(w @ att), psi_m @ w
        raw = selected * p[coh]
        total = raw.sum()
        w = raw / total
        # w_c = raw_c / total with raw_c = selected_c p_g(c): IF(w_c) = IF(raw_c) / total - raw_c IF(total) / total^2
        share_sum = (psi_p[:, coh] * selected).sum(axis=1)
        infl_w = (psi_p[:, coh] * selected) / total - np.outer(share_sum, raw) / total ** 2
        return float(w @ att), psi_m @ w + infl_w @ att

    names, est, infl = ["overall"], [], []
    e0, i0 = aggregate((rel >= 0).astype(float), True)
    est.append(e0)
    infl.append(i0)
    window = [] if overall_only else options.relative_periods()
    for k in window:
        sel = (rel == k).astype(float)
        if sel.any():
            ek, ik = aggregate(sel, True)
            names.append(term_of("rel", k))
            est.append(ek)
            infl.append(ik)
    for gi, g in enumerate([] if overall_only else cohorts):
        sel = ((coh == gi) & (rel >= 0)).astype(float)
        if sel.any():
            eg, ig = aggregate(sel, False)
            names.append(term_of("cohort", design.labels[g]))
            est.append(eg)
            infl.append(ig)
    infl_m = np.column_stack(infl)
    cl_codes, _ = pd.factorize(unit_cluster)
    sums, n_cl = cluster_sums(infl_m, cl_codes)
    factor = n_cl / (n_cl - 1) if n_cl > 1 else float("nan")
    cov = sums.T @ sums * factor
    # multiplier bootstrap over the window's relative periods: sup-t critical value
    in_window = [j for j, nm in enumerate(names) if nm.startswith("rel=")]
    critical = float("nan")
    if in_window and options.draws > 0:
        rng = np.random.default_rng(seed)
        sd = np.sqrt(np.diag(cov)[in_window])
        ok = sd > 0
        if ok.any():
            signs = rng.choice((-1.0, 1.0), size=(options.draws, n_cl))
            stats = np.abs(signs @ sums[:, in_window][:, ok]) * math.sqrt(factor) / sd[ok]
            critical = float(np.quantile(stats.max(axis=1), level))
    if overall_only:
        table = pd.DataFrame(columns=["cohort", "period", "relative", "estimate", "std_error"])
    else:
        cell_sums, _ = cluster_sums(psi_m, cl_codes)
        se_cells = np.sqrt((cell_sums ** 2).sum(axis=0) * factor)
        table = pd.DataFrame({"cohort": [design.labels[c[1]] for c in cells],
                              "period": [design.labels[c[2]] for c in cells], "relative": rel,
                              "estimate": att, "std_error": se_cells})
    message = (f"{left_out} unit(s) not observed in every period are left out (group-time effects use a "
               "balanced panel)" if left_out else "")
    # each unit's influence on the overall estimate, spread evenly over its rows (one per period)
    first = np.zeros(n_rows)
    first[kept_rows] = infl_m[u, 0] / n_periods
    out = LinearEstimates(tuple(names), np.array(est), cov, float(n_cl - 1), n_cl, len(y), message,
                          uniform_critical=critical, influence=first)
    return out, table
