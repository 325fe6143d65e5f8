"""Least-squares, 2SLS and Poisson PML refits of the joint tests' draws as reweightings of the data, without a
copied panel.

A draw of :func:`fegrid.joint.draw_levels` takes ``c_l`` copies of every level ``l`` of the
resampling column; the stacked panel gives each copy its own unit (and resampling-level) labels.
For least squares, the stacked fit is the original rows weighted by their copies (Frisch-Waugh-Lovell):

* absorbed terms whose groups lie within levels of the resampling column (unit effects, unit
  trends) project out the same way whatever the counts, which are constant within their groups:
  their residuals are computed once per design, not once per draw;
* the other absorbed terms (period effects: categorical, with few levels) enter through their
  dummies, made orthogonal to the nested terms once, and are partialled out on each draw from the
  draw's cross products (with no nested term, the intercept is such a column); with too many dummies
  for every row (region-by-period effects), each row keeps those of its own resampling level's groups
  and a draw solves for them part by part (:class:`_LocalDummies`); failing that (parts too large, a
  trend crossing the copies), each draw demeans the drawn rows, weighted by their copies;
* each specification's coefficients then come from the draw's small cross products: the rows' cross
  products summed per resampling level once per design, weighted by the levels' copies on each draw.

Standard errors and degrees of freedom depend on the copies themselves: each copy is a cluster of its
own when clustering on the unit or the resampling column, and each copy's effects are levels of their
own. They are computed on the design's rows with the copies as counts: the engine's covariance formulas
(:mod:`fegrid.covariance`) with ``N`` the copies' total, a relabelled cluster's sum counted once per
copy and a shared cluster's sum taken over the copies; the absorbed df and nested df that the engine's
:class:`fegrid.absorb.Absorber` would count on the stacked rows are read off the copies
(:class:`_CopiesDf`); the singleton rule is the engine's (:func:`fegrid.absorb.drop_singletons`), on
the stacked rows' codes when the copies could change its answer.

A draw's sample is the copies of the sample's rows in the data. A block of a draw that meets a case
this shortcut could get wrong takes the stacked refit instead (:func:`fegrid.joint.draw_curves` does
it): a draw without any of the sample's rows; a singleton that the copies make or unmake; an
identification decision (absorbed or collinear regressor) near its threshold; a nearly constant
column. Two-stage least squares is refitted the same way, from the same cross products (its
instruments are more columns of the design), with the engine's identification rules: an instrument
absorbed by the effects, collinear with the controls or also a control is dropped, too few left or a
rank-deficient first stage leave the specification not identified in that draw. Poisson PML (under
its imposed null) is fitted on the drawn rows with their copies as frequency weights, by the engine's
own iterations (:func:`fegrid.poisson.irls`, started from the design's own fit under the null), then its
scores are laid out on the stacked rows and taken by the engine's covariance kinds (and so are the
least-squares specifications of a design that holds Poisson ones); the rules it meets first (zero
groups, separation, regressors left constant) follow the engine's, and a draw they could decide
differently takes the stacked refit (see :meth:`_Design._poisson`). A two-way event study is the
least-squares regression on its relative-period indicators reparametrized so that the focal coefficient is
the reported average (:func:`_as_least_squares`), refitted with the least-squares draws; a draw that
leaves out one of its regressors, comes near the stacked fit's identification rule or lacks a period takes
the stacked refit, and so does an event study with two-way clustering. An interaction-weighted estimate is
least squares on its cohort x period cells with each draw's cohort shares (never-treated controls, clustered
or heteroskedasticity-robust). Group-time effects (unweighted) are computed from the balanced units counted
by their copies (:class:`_GroupTimeDraws`), and imputation estimates by the engine's own function on the
copies' arrays (:class:`_ImputationDraws`). Other staggered-adoption specifications take the stacked path.
The results equal the stacked refits' to the demeaning tolerance (the convergence rule's, for Poisson PML;
tests/test_reweight.py).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any, NamedTuple

import numpy as np
import pandas as pd

from .absorb import (
    HUB_CELLS,
    Absorber,
    LevelCodes,
    _components,
    _constant_within,
    _nested,
    _outranks,
    _pinv_many,
    codes_on_rows,
    drop_singletons,
)
from .covariance import TWO_WAY_SIGNS, FitPieces, Iid, OneWay, Robust, TwoWay, clip_negative, covariance_kind
from .errors import EstimationError, FegridError
from .estimate import (
    FIRST_STAGE_RANK_TOL,
    BlockSettings,
    _covariance_codes,
    _needed,
    first_stage_rank,
    rows_cohorts,
    staggered_cluster_dim,
)
from .estimators import LEAST_SQUARES, POISSON, TWO_STAGE, Estimator
from .grid import Grid, Spec
from .lazy import LazyModule
from .poisson import irls, positives_span_everything, zero_group_rows
from .samples import sample_rows
from .staggered import (
    EVENT_STUDY,
    GROUP_TIME,
    IMPUTATION,
    INTERACTION_WEIGHTED,
    Cohorts,
    event_indicators,
    imputation_pieces,
    interaction_cells,
)

sp = LazyModule("scipy.sparse")
csgraph = LazyModule("scipy.sparse.csgraph")

__all__ = ["Draw", "draw_picks", "draw_levels", "fast_specs", "REWEIGHTED_METHODS", "BATCH_DRAWS", "ReweightedBlock",
           "prepare_blocks"]

#: The estimation methods whose draws are refitted as reweightings (the others take the stacked copies).
REWEIGHTED_METHODS = (LEAST_SQUARES, TWO_STAGE, POISSON)

#: Most dummy columns of the non-nested absorbed terms a design partials out per draw.
MAX_DUMMIES = 64

#: Most groups in one connected part of a design's crossing groups held as local dummies (:class:`_LocalDummies`).
LOCAL_MAX_PART = 256

#: Identification decisions within this factor of their threshold take the stacked refit.
MARGIN = 100.0

#: Most numbers (resampling levels x columns x columns) of a design's cross products summed per resampling
#: level once, so that a draw's cross products are those sums weighted by the levels' copies (8 MB); larger
#: designs sum over their rows on each draw.
MAX_CROSS_CELLS = 1_000_000

#: The same for a design holding event studies or interaction-weighted estimates (64 MB): their many indicator
#: columns need the batch (each draw alone would take the stacked refit, several times slower).
MAX_CROSS_CELLS_STAGGERED = 8_000_000

#: Draws a least-squares design refits together (:meth:`_Design.refit_many`): one batched product per
#: step for all of them instead of one per draw.
BATCH_DRAWS = 50

#: Most numbers (rows x draws x 8) of the row values a batch of draws holds at once (32 MB): larger designs
#: take fewer draws per batch.
BATCH_CELLS = 4_000_000


class Draw(NamedTuple):
    """One bootstrap draw of the levels of the resampling column."""

    counts: np.ndarray  # copies of each level
    rows: np.ndarray  # positions (in the frame) of the stacked rows, copy after copy
    position: np.ndarray  # the copy (draw position) of each stacked row
    picks: np.ndarray  # the level drawn at each position


def draw_picks(n_levels: int, rng: np.random.Generator) -> np.ndarray:
    """The levels a draw takes, position by position (``n_levels`` draws with replacement)."""
    return rng.integers(0, n_levels, size=n_levels)


def draw_levels(codes: np.ndarray, n_levels: int, rng: np.random.Generator) -> Draw:
    """Draw ``n_levels`` levels with replacement; the stacked rows of their copies, in draw order."""
    order = np.argsort(codes, kind="stable")
    counts = np.bincount(codes, minlength=n_levels)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    picks = draw_picks(n_levels, rng)
    lengths = counts[picks]
    offsets = np.repeat(starts[picks] - np.concatenate([[0], np.cumsum(lengths)[:-1]]), lengths)
    rows = order[offsets + np.arange(lengths.sum())]
    return Draw(np.bincount(picks, minlength=n_levels), rows, np.repeat(np.arange(n_levels), lengths), picks)


def fast_specs(specs: Sequence[Spec], observed: Mapping[str, float] | None = None) -> tuple[list[Spec], list[Spec]]:
    """The specifications a reweighting can refit (least squares, 2SLS, and Poisson PML with its observed
    estimate in ``observed``, whose null the draws impose) and the others."""
    observed = observed or {}
    fast = [s for s in specs if (s.estimator.method in REWEIGHTED_METHODS and s.estimator.staggered is None
                                 and (s.estimator.method != POISSON or s.spec_id in observed))
            or _event_study(s) or _group_time(s) or _interaction_weighted(s) or _imputation(s)]
    ids = {s.spec_id for s in fast}
    return fast, [s for s in specs if s.spec_id not in ids]


def _event_study(spec: Spec) -> bool:
    """Whether ``spec`` is a two-way event study that draws refit as least squares (:func:`_as_least_squares`):
    not with two-way clustering, whose covariance of the indicators is clipped as a whole before it is
    combined (the combination's own variance, clipped, can differ)."""
    return spec.estimator.method == EVENT_STUDY and not isinstance(covariance_kind(spec.inference.kind), TwoWay)


def _interaction_weighted(spec: Spec) -> bool:
    """Whether ``spec`` is an interaction-weighted estimate that draws refit as least squares on its cells with
    the draw's cohort shares (:func:`_as_least_squares`): never-treated controls, and a covariance kind that
    sums over ``h e`` (clustered, heteroskedasticity-robust), whose variance the engine's draws take from the
    aggregate's own ``h`` and the shares' part (``estimate._indicator_result``)."""
    return (spec.estimator.method == INTERACTION_WEIGHTED and spec.estimator.staggered is not None
            and spec.estimator.staggered.control == "never_treated"
            and isinstance(covariance_kind(spec.inference.kind), (OneWay, Robust)))


def _imputation(spec: Spec) -> bool:
    """Whether ``spec`` is an imputation estimate that draws compute from the copies' arrays
    (:class:`_ImputationDraws`): unweighted, absorbing effects only (what the engine takes), clustered by one
    set of columns or by the unit."""
    return (spec.estimator.method == IMPUTATION and spec.weights is None
            and all(t.kind == "effect" for t in spec.absorb))


class _LeaveStacked(Exception):
    """Specifications that a design cannot refit (their ids): the block leaves them to the stacked refit."""

    def __init__(self, ids: set[str]) -> None:
        super().__init__(", ".join(sorted(ids)))
        self.ids = ids


class _Shares(NamedTuple):
    """An interaction-weighted estimate's aggregation, computed per draw from the copies: each row's cell
    (-1: none), which cells are from adoption on, and the clusters of the shares' variance."""

    cell_of_row: np.ndarray
    post: np.ndarray
    share_dim: tuple[str, ...]


def _group_time(spec: Spec) -> bool:
    """Whether ``spec`` holds group-time effects that draws refit from the copies' counts (:class:`_GroupTimeDraws`):
    not weighted (the engine refuses weights for them), clustered by one column or by the unit."""
    return (spec.estimator.method == GROUP_TIME and spec.weights is None
            and (spec.inference.kind != "clustered" or len(spec.inference.by[0]) == 1))


#: The prefix of the columns a design adds for its event studies' reparametrized indicators.
EVENT_COLUMN = "__fegrid_event_study__"


def _as_least_squares(rows: pd.DataFrame, specs: list[Spec], settings: BlockSettings
                      ) -> tuple[pd.DataFrame, list[Spec], dict[str, tuple[list[str], np.ndarray]], Cohorts | None,
                                 dict[str, _Shares]]:
    """The design's rows and specifications with each two-way event study as the least-squares regression that
    gives its estimate as the focal coefficient.

    The event study regresses the outcome on relative-period indicators ``X`` (and the controls) and reports
    ``a'b``, ``a`` the average over the periods from adoption on. With ``X~ = X M``, ``M``'s first column
    ``e_j0 / a_j0`` (``j0`` the first period after adoption) and the others ``e_j - (a_j / a_j0) e_j0``
    (``j != j0``), the regression on ``X~`` has coefficients ``T b`` with ``T = M^-1``, whose first row is
    ``a``: its first coefficient is ``a'b``, and its first row of the inverse cross products gives
    ``h = X B a``, so every covariance kind that sums over ``h e`` (and the homoskedastic one, ``a'Ba``)
    gives the event study's standard error; the df are the same (as many regressors). The indicators are
    those of :func:`fegrid.staggered.event_indicators` on the design's rows, with their cohorts (of
    :func:`fegrid.staggered.cohorts_of`, as the stacked fit computes them).

    An interaction-weighted estimate (Sun & Abraham 2021) is least squares on its cohort x relative-period
    cells: the reported aggregate weights the cells from adoption on by their observations, which each draw
    counts from the copies (the weights then vary by draw: :meth:`_Design._refit_batch` takes the aggregate
    and its ``h = X B a`` from them), and the estimated shares add their variance (as
    :func:`fegrid.staggered.share_covariance`). Its rows must all be kept (no unit treated throughout), else
    :class:`_LeaveStacked`.

    Returns the rows with the new columns, the specifications (replaced by least squares with the same id),
    per event study and interaction-weighted estimate its regressors in order with ``T`` (the stacked fit's
    identification rule reads the indicators' cross products, ``T' G T``; see
    :meth:`_Design._event_study_checks`), the rows' cohorts (``None`` without either), and the
    interaction-weighted estimates' aggregations."""
    strict: dict[str, tuple[list[str], np.ndarray]] = {}
    shares: dict[str, _Shares] = {}
    indicators = {s.spec_id for s in specs if s.estimator.method in (EVENT_STUDY, INTERACTION_WEIGHTED)}
    if not indicators:
        return rows, specs, strict, None, shares
    cohorts = rows_cohorts(rows, settings)
    if cohorts.counts()["cohorts"] == 0:
        raise _LeaveStacked(indicators)  # no unit adopts: the stacked fit says so
    events: dict[object, tuple[list[str], np.ndarray]] = {}  # per options: columns, T
    cells_of: dict[object, tuple[list[str], np.ndarray, np.ndarray]] = {}  # per options: columns, row cells, post
    added: dict[str, np.ndarray] = {}
    out: list[Spec] = []
    for spec in specs:
        options = spec.estimator.staggered
        if spec.spec_id not in indicators or options is None:
            out.append(spec)
            continue
        tag = f"{EVENT_COLUMN}{len(events) + len(cells_of)}_"
        if spec.estimator.method == INTERACTION_WEIGHTED:
            # least squares on the cohort x relative-period cells (the design's rows must all be kept: no unit
            # treated throughout), the aggregate's weights from each draw's cell counts
            if options not in cells_of:
                ours = {t.spec_id for t in specs if t.estimator.method == INTERACTION_WEIGHTED}
                try:
                    cells = interaction_cells(cohorts, options)
                except ValueError:
                    raise _LeaveStacked(ours) from None
                if not cells.rows.all() or not cells.cells:
                    raise _LeaveStacked(ours)
                names = [f"{tag}{j}" for j in range(len(cells.cells))]
                added.update(zip(names, cells.matrix.T))
                cells_of[options] = (names, np.where(cells.matrix.any(axis=1), cells.matrix.argmax(axis=1), -1),
                                     np.array([r >= 0 for _, r in cells.cells], dtype=float))
            columns, cell_of_row, post = cells_of[options]
            strict[spec.spec_id] = ([*columns, *spec.controls], np.eye(len(columns)))
            shares[spec.spec_id] = _Shares(cell_of_row, post, staggered_cluster_dim(spec.inference, settings.unit))
        else:
            if options not in events:
                x, names = event_indicators(cohorts, options)
                rel = np.array([int(n.split("=")[1]) for n in names])
                a = (rel >= 0) / max(int((rel >= 0).sum()), 1)
                after = np.flatnonzero(a)
                if not len(after):
                    raise _LeaveStacked({t.spec_id for t in specs if t.estimator.method == EVENT_STUDY})
                j0, k = int(after[0]), len(names)
                others = [j for j in range(k) if j != j0]
                m = np.zeros((k, k))
                m[j0, 0] = 1.0 / a[j0]
                for col, j in enumerate(others, start=1):
                    m[j, col] = 1.0
                    m[j0, col] = -a[j] / a[j0]
                names = [f"{tag}focal", *(f"{tag}{j}" for j in others)]
                added.update(zip(names, (x @ m).T))
                events[options] = (names, np.linalg.inv(m))
            columns, t = events[options]
            strict[spec.spec_id] = ([*columns, *spec.controls], t)
        out.append(replace(spec, focal=columns[0], controls=(*columns[1:], *spec.controls), estimator=Estimator()))
    return rows.assign(**added), out, strict, cohorts, shares


class _Fit(NamedTuple):
    """One Poisson PML fit of a draw: the kept columns (focal first; empty when the focal regressor is not
    identified in this draw), ``B``, the coefficients, the scaled residuals ``e``, the focal row ``h`` of
    ``B X'`` and the scores' regressors ``X``, on the draw's stacked rows; a fit that leaves some rows out
    brings the absorber and codes of the rest."""

    idx: list[int]
    bread: np.ndarray
    beta: np.ndarray
    e: np.ndarray
    h: np.ndarray
    regressors: np.ndarray
    absorber: Absorber | None = None
    codes: dict[tuple[str, ...], np.ndarray] | None = None


_NOT_IDENTIFIED = _Fit([], np.empty((0, 0)), np.empty(0), np.empty(0), np.empty(0), np.empty((0, 0)))


class _Coef(NamedTuple):
    """One least-squares or 2SLS regression of a draw, in terms of the design's (partialled) columns ``z``:
    the kept columns (focal first; empty when the focal regressor is not identified in this draw), ``B``,
    the coefficients, and the combinations of the columns that give the residuals (``z @ e``), the focal
    row of ``B X'`` (``z @ h``) and the scores' regressors (``z @ x``: ``X``, or the fitted ``PX`` of 2SLS)."""

    idx: list[int]
    bread: np.ndarray
    beta: np.ndarray
    e: np.ndarray
    h: np.ndarray
    x: np.ndarray


_NOT_IDENTIFIED_COEF = _Coef([], np.empty((0, 0)), np.empty(0), np.empty(0), np.empty(0), np.empty((0, 0)))


class _Batch(NamedTuple):
    """One least-squares regression of a batch of draws (:meth:`_Design.refit_many`): the draws it was
    computed on (positions in the batch), the kept columns (focal first), ``B`` and the focal coefficient
    per draw, the residuals and the focal row of ``B X'`` on the design's rows (rows, draws), and what gives
    the draws' partialled columns on the rows (:meth:`_Design._batch_rows`)."""

    draws: np.ndarray
    idx: list[int]
    bread: np.ndarray
    beta: np.ndarray
    e: np.ndarray
    h: np.ndarray
    basis: tuple[np.ndarray | None, np.ndarray | None]
    memo: dict[object, Any]


class _Weighted(NamedTuple):
    """A draw's design rows, each weighted by its copies: the stored columns ``u`` of the rows, the
    combinations that give the design's partialled columns (``z = u @ transform``; ``None``: ``z = u``),
    which rows of the design they are (``None``: all), their copies and weights, and the draw's copies of
    each resampling level."""

    u: np.ndarray
    transform: np.ndarray | None
    rows: np.ndarray | None
    copies: np.ndarray
    w: np.ndarray
    counts: np.ndarray
    local: _LocalDummies | None = None  # with the crossing groups' coefficients of the columns (groups, m)
    local_gamma: np.ndarray | None = None

    def at(self, v: np.ndarray) -> np.ndarray:
        """``z @ v`` on the rows."""
        if self.local is not None:
            assert self.local_gamma is not None
            return self.u @ v - self.local.correction(self.local_gamma @ v)
        return self.u @ (v if self.transform is None else self.transform @ v)

    def on(self, codes: np.ndarray) -> np.ndarray:
        """Codes on the design's rows, on these rows."""
        return codes if self.rows is None else codes[self.rows]


def _cross_per_level(u: np.ndarray, w: np.ndarray, level: np.ndarray, n_levels: int,
                     most: int = MAX_CROSS_CELLS) -> np.ndarray | None:
    """``sum_i w_i u_i u_i'`` over the rows of each level, flattened (levels, q * q): the rows laid out
    level by level in a table padded with zero rows, and one batched product; ``None`` when the table
    would be larger than ``most`` numbers or more than half padding."""
    n, q = u.shape
    sizes = np.bincount(level, minlength=n_levels)
    longest = int(sizes.max()) if n else 0
    if n_levels * q * q > most or n_levels * longest > 2 * n:
        return None
    order = np.argsort(level, kind="stable")
    first = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    slot = np.arange(n) - first[level[order]]
    table = np.zeros((n_levels, longest, q))
    table[level[order], slot] = u[order]
    weighted = np.zeros((n_levels, longest))
    weighted[level[order], slot] = w[order]
    return np.matmul(table.transpose(0, 2, 1) * weighted[:, None, :], table).reshape(n_levels, q * q)


def _time_squares(time: np.ndarray, codes: np.ndarray, w: np.ndarray, n: int) -> np.ndarray:
    """Per group, the weighted sum of squares of the time centred on its weighted mean (as a trend's
    projection in :mod:`fegrid.absorb` computes it)."""
    wsum = np.bincount(codes, w, minlength=n)
    inv = np.divide(1.0, wsum, out=np.zeros_like(wsum), where=wsum > 0)
    tc = time - (np.bincount(codes, w * time, minlength=n) * inv)[codes]
    return np.bincount(codes, w * (tc * tc), minlength=n)


class _CopiesDf:
    """The df that :class:`fegrid.absorb.Absorber` counts for the absorbed terms on a draw's stacked rows
    (``absorbed_df``, and ``nested_df`` for cluster variables), from the design's rows and the draw's copies,
    without stacking them: the same count (the redundant terms, the levels, the components of the two
    largest terms, the slopes), each piece read off the copies.

    A term (or cluster variable) holding the unit or the resampling column is relabelled per copy: its
    groups on the stacked rows are (copy, group) pairs, its levels the pairs' copies summed, its slopes
    those of each pair counted per copy. A shared term's groups take every copy of their rows. Nesting
    on the stacked rows is nesting on the drawn rows (pairs for relabelled terms), except that a shared
    group lies within one relabelled group only if it lies within one copy. Components of two relabelled
    terms are each copy's, those of a level counted once per copy; with a shared term, the copies of a pair
    meet the same shared groups, so the drawn rows have the stacked rows' components.
    """

    def __init__(self, design: _Design) -> None:
        s = design.settings
        self.terms = tuple(s.absorb)
        self.dims = design.dims
        self.levels = design.levels
        self.time = design.time
        self.w = design.w
        self.has_slope = [t.has_slope and design.time is not None for t in self.terms]
        self.copied = [self.dims[t.groups].copied for t in self.terms]
        # per shared variable, its groups' resampling levels (one row per group and level): the copies it spans
        self._spans: dict[tuple[str, ...], tuple[np.ndarray, np.ndarray]] = {}
        for g, dim in self.dims.items():
            if not dim.copied:
                pairs = np.unique(dim.codes.astype(np.int64) * design.n_levels + self.levels)
                self._spans[g] = (pairs // design.n_levels, pairs % design.n_levels)
        # per relabelled trend, each pair's sum of squares of centred time (the same in every copy)
        self._pair_ss: dict[int, np.ndarray] = {}
        for i, t in enumerate(self.terms):
            if self.has_slope[i] and self.copied[i]:
                assert self.time is not None
                pair_level = self.dims[t.groups].pair_level
                assert pair_level is not None
                self._pair_ss[i] = _time_squares(self.time, self._pair(t.groups), self.w, len(pair_level))
        self.n_levels = design.n_levels
        self._level_components: dict[tuple[int, int], np.ndarray] = {}
        self._nesting: dict[tuple[tuple[str, ...], tuple[str, ...]], tuple[bool, np.ndarray | None]] = {}
        self._hubs: dict[tuple[int, int], tuple[bool, np.ndarray]] = {}
        self.level_ids = np.unique(self.levels)  # the resampling levels holding the design's rows
        self._span_matrices: dict[tuple[str, ...], sp.csr_array] = {}
        self._constant: dict[int, bool] = {}
        self._pairs_of: dict[tuple[tuple[str, ...], tuple[str, ...]], tuple[sp.csr_array, sp.csr_array]] = {}
        self._blocks_of: dict[tuple[int, int], np.ndarray | None] = {}

    def _pair(self, g: tuple[str, ...]) -> np.ndarray:
        pair = self.dims[g].pair
        assert pair is not None
        return pair

    def count(self, draw: Draw, by_sets: Sequence[tuple[tuple[str, ...], ...]]) -> tuple[int, dict]:
        """``absorbed_df`` on the draw's stacked rows and ``nested_df`` for each set of cluster variables."""
        counts = draw.counts
        copies = counts[self.levels]
        drawn = np.flatnonzero(copies > 0)
        if not self.terms:
            return 1, {by: 0 for by in by_sets}
        state = _DrawState(self, counts, copies, drawn)
        active = []
        for i, term in enumerate(self.terms):
            redundant = not term.has_slope and any(
                j != i and _outranks(self.terms[j], state.nlev[j], j, state.nlev[i], i)
                and state.nested(self.terms[j].groups, self.terms[i].groups)
                for j in range(len(self.terms)))
            if not redundant:
                active.append(i)
        absorbed = state.rank(active)
        nested_df = {}
        for by in by_sets:
            if not by:
                nested_df[by] = 0
                continue
            nested = [i for i in active if all(state.nested(self.terms[i].groups, d) for d in by)]
            nested_df[by] = min(state.rank(nested), absorbed) if nested else 0
        return absorbed, nested_df

    def count_many(self, draws: Sequence[Draw], counts: np.ndarray, by_sets: Sequence[tuple[tuple[str, ...], ...]]
                   ) -> tuple[np.ndarray, dict]:
        """:meth:`count` of each draw (``counts``: the draws' copies of each level, (draws, levels)), the same
        numbers. With at most two terms (a trend relabelled per copy among them), every decision is taken
        for all the draws at once from the levels they draw: levels, slopes, nesting, redundancy, and the
        two terms' components (a group meeting every drawn group of the other term; or the resampling
        levels falling into blocks, each level meeting every other of its block through a shared group and
        none outside it, so that the components are the blocks drawn). A draw whose components (or
        trend) need its drawn rows takes :meth:`count`. Arrays of ``absorbed_df``, and of ``nested_df`` per
        set of cluster variables."""
        d_count = len(draws)
        absorbed = np.zeros(d_count, dtype=np.int64)
        nested_df = {by: np.zeros(d_count, dtype=np.int64) for by in by_sets}
        if not self.terms:
            return absorbed + 1, nested_df
        terms = self.terms
        alone = np.zeros(d_count, dtype=bool)
        if len(terms) > 2 or any(self.has_slope[i] and not self.copied[i] for i in range(len(terms))):
            alone[:] = True
        else:
            drawn = counts > 0
            copies_twice = (counts[:, self.level_ids] > 1).any(axis=1)
            nlev = [self._levels_many(t.groups, counts, drawn) for t in terms]
            slopes = [self._slopes_many(i, counts) if self.has_slope[i] else None for i in range(len(terms))]
            known_nesting: dict[tuple[tuple[str, ...], tuple[str, ...]], np.ndarray] = {}

            def nested(inner: tuple[str, ...], outer: tuple[str, ...]) -> np.ndarray:
                if (inner, outer) not in known_nesting:
                    known_nesting[(inner, outer)] = self._nested_many(inner, outer, counts, drawn, copies_twice)
                return known_nesting[(inner, outer)]

            active = np.ones((d_count, len(terms)), dtype=bool)
            for i in range(len(terms)):
                if self.has_slope[i]:  # a trend is never redundant
                    continue
                for j in range(len(terms)):
                    if j == i:
                        continue
                    outranks = (np.ones(d_count, dtype=bool) if terms[j].has_slope
                                else (nlev[j] > nlev[i]) | ((nlev[j] == nlev[i]) & (j < i)))
                    active[:, i] &= ~(outranks & nested(terms[j].groups, terms[i].groups))
            both = len(terms) == 2
            components = np.zeros(d_count, dtype=np.int64)
            if both:  # (count takes the larger term first; the counts below are symmetric in the two)
                if self.copied[0] and self.copied[1]:
                    components = counts.astype(np.int64) @ self.level_components(0, 1)
                else:
                    hub = self._hub_drawn_many(0, 1, drawn)
                    components = hub.astype(np.int64)
                    need = active.all(axis=1) & ~hub
                    if need.any():  # (two shared terms: counted on the drawn rows)
                        blocks = (self._blocks(0 if self.copied[0] else 1, 1 if self.copied[0] else 0)
                                  if self.copied[0] or self.copied[1] else None)
                        if blocks is None:  # counted on the drawn rows
                            alone |= need
                        else:
                            components = np.where(hub, 1, ((drawn @ blocks) > 0).sum(axis=1))

            def rank(members: np.ndarray) -> np.ndarray:
                """_count_rank of each draw's members (draws, terms)."""
                nonlocal alone
                total = sum(np.where(members[:, i], nlev[i], 0) for i in range(len(terms)))
                for i, slope in enumerate(slopes):
                    if slope is None:
                        continue
                    total = total + np.where(members[:, i], slope, 0)
                    for j in range(len(terms)):  # the slopes sum to time, which an effect constant in time spans
                        if j == i or terms[j].has_slope:
                            continue
                        with_it = members[:, i] & members[:, j]
                        if self._time_constant_within(j):  # on the design's rows, so on any drawn rows
                            total = total - with_it
                        else:  # perhaps on some drawn rows: counted on them
                            alone |= with_it
                if both:
                    total = total - np.where(members.all(axis=1), components, 0)
                return total

            absorbed = rank(active)
            for by in by_sets:
                if not by:
                    continue
                inside_all = active.copy()
                for i in range(len(terms)):
                    for dim in by:
                        inside_all[:, i] &= nested(terms[i].groups, dim)
                nested_df[by] = np.where(inside_all.any(axis=1), np.minimum(rank(inside_all), absorbed), 0)
        for k in np.flatnonzero(alone):
            a_df, per_by = self.count(draws[k], by_sets)
            absorbed[k] = a_df
            for by, v in per_by.items():
                nested_df[by][k] = v
        return absorbed, nested_df

    def _slopes_many(self, i: int, counts: np.ndarray) -> np.ndarray:
        """The slopes a relabelled trend term counts in each draw (as :meth:`_DrawState._count_rank`)."""
        ss = self._pair_ss[i]
        pair_level = self.dims[self.terms[i].groups].pair_level
        assert pair_level is not None
        mult = counts[:, pair_level]
        on = mult > 0
        top = np.where(on, ss, -np.inf).max(axis=1, initial=-np.inf)
        threshold = np.where(on.any(axis=1), 1e-12 * (1 + top), 0.0)
        return (mult * (ss > threshold[:, None])).sum(axis=1).astype(np.int64)

    def _time_constant_within(self, j: int) -> bool:
        """Whether time is constant within each group of term ``j`` on the design's rows (so on any drawn rows)."""
        if j not in self._constant:
            g = self.terms[j].groups
            self._constant[j] = _constant_within(self.time, self._pair(g) if self.copied[j] else self.dims[g].codes)
        return self._constant[j]

    def _blocks(self, relabelled: int, shared: int) -> np.ndarray | None:
        """The resampling levels' blocks for the components of a relabelled term (one group per level) and a
        shared one: (levels, blocks) incidence, each level of a block meeting every other of it through a
        shared group and none outside it; ``None`` when the levels do not fall into such blocks."""
        key = (relabelled, shared)
        if key not in self._blocks_of:
            out: np.ndarray | None = None
            pair_level = self.dims[self.terms[relabelled].groups].pair_level
            assert pair_level is not None
            if np.bincount(pair_level, minlength=self.n_levels).max(initial=0) <= 1:
                groups, levels = self._spans[self.terms[shared].groups]
                meets = sp.csr_array((np.ones(len(groups)), (levels, groups)),
                                     shape=(self.n_levels, self.dims[self.terms[shared].groups].n))
                linked = (meets @ meets.T).astype(bool).tocsr()
                n_blocks, block = csgraph.connected_components(linked, directed=False)
                sizes = np.bincount(block[self.level_ids], minlength=n_blocks)
                per_level = np.diff(linked.indptr)[self.level_ids]  # the levels each meets (itself too)
                if np.array_equal(per_level, sizes[block[self.level_ids]]):  # every block complete
                    used, local = np.unique(block[self.level_ids], return_inverse=True)
                    out = np.zeros((self.n_levels, len(used)))
                    out[self.level_ids, local] = 1.0
            self._blocks_of[key] = out
        return self._blocks_of[key]

    def _levels_many(self, g: tuple[str, ...], counts: np.ndarray, drawn: np.ndarray) -> np.ndarray:
        """:meth:`_DrawState.levels_of` for each draw: a relabelled variable's groups counted per copy, a
        shared one's groups holding a drawn row."""
        dim = self.dims[g]
        if dim.copied:
            assert dim.pair_level is not None
            return counts[:, dim.pair_level].sum(axis=1).astype(np.int64)
        return (self._pair_sums(g, drawn) > 0).sum(axis=1)

    def _pair_sums(self, g: tuple[str, ...], values: np.ndarray) -> np.ndarray:
        """Per draw, a shared variable's groups' sums of ``values`` (draws, levels) over the resampling levels
        holding their rows (draws, groups)."""
        if g not in self._span_matrices:
            groups, levels = self._spans[g]
            self._span_matrices[g] = sp.csr_array((np.ones(len(groups)), (groups, levels)),
                                                  shape=(self.dims[g].n, self.n_levels))
        return (self._span_matrices[g] @ values.T.astype(float)).T

    def _nested_many(self, inner: tuple[str, ...], outer: tuple[str, ...], counts: np.ndarray, drawn: np.ndarray,
                     twice: np.ndarray) -> np.ndarray:
        """:meth:`_DrawState.nested` for each draw: the same order of decisions, and the drawn rows' nesting
        read off the drawn levels (:meth:`_nested_on_drawn`)."""
        d_count = len(counts)
        settled_false = np.zeros(d_count, dtype=bool)
        if not self.dims[inner].copied and self.dims[outer].copied:
            settled_false = twice | (self._pair_sums(inner, counts) > 1).any(axis=1)
        inside, witness = self.nesting(inner, outer)
        if inside:
            return ~settled_false
        result = np.zeros(d_count, dtype=bool)
        open_ = ~settled_false
        if witness is not None:
            open_ &= ~drawn[:, self.levels[witness]].all(axis=1)  # two drawn rows break it
        if open_.any():
            result[open_] = self._nested_on_drawn(inner, outer, drawn[open_])
        return result

    def _nested_on_drawn(self, inner: tuple[str, ...], outer: tuple[str, ...], drawn: np.ndarray) -> np.ndarray:
        """Per draw (``drawn``: its levels drawn, (draws, levels)), whether every group of ``inner`` lies within
        one group of ``outer`` on the drawn rows (pairs for relabelled variables), as ``_nested`` on them: an
        (inner, outer) pair of groups holds a drawn row when one of the levels holding its rows is drawn."""
        key = (inner, outer)
        if key not in self._pairs_of:
            ci, co = (self._pair(g) if self.dims[g].copied else self.dims[g].codes for g in (inner, outer))
            n_outer = int(co.max()) + 1 if len(co) else 1
            triples = np.unique((ci.astype(np.int64) * n_outer + co) * self.n_levels + self.levels)
            pairs, pair_of = np.unique(triples // self.n_levels, return_inverse=True)
            levels_of = sp.csr_array((np.ones(len(triples)), (pair_of.ravel(), triples % self.n_levels)),
                                     shape=(len(pairs), self.n_levels))
            inner_of = sp.csr_array((np.ones(len(pairs)), (pairs // n_outer, np.arange(len(pairs)))),
                                    shape=(int(ci.max()) + 1 if len(ci) else 0, len(pairs)))
            self._pairs_of[key] = (levels_of, inner_of)
        levels_of, inner_of = self._pairs_of[key]
        held = (levels_of @ drawn.T.astype(float)) > 0  # (pairs, draws)
        return (inner_of @ held.astype(float) <= 1).all(axis=0)

    def _hub_drawn_many(self, a: int, b: int, drawn: np.ndarray) -> np.ndarray:
        """:meth:`hub_drawn` for each draw."""
        always, rows = self._hub(a, b)
        if always:
            return np.ones(len(drawn), dtype=bool)
        if not len(rows):
            return np.zeros(len(drawn), dtype=bool)
        return drawn[:, self.levels[rows]].any(axis=1)

    def nesting(self, inner: tuple[str, ...], outer: tuple[str, ...]) -> tuple[bool, np.ndarray | None]:
        """Whether ``inner`` nests in ``outer`` on the design's rows (pairs for relabelled variables) and, if
        not, two rows of one ``inner`` group in two ``outer`` groups (``None``: the rows drawn decide)."""
        key = (inner, outer)
        if key not in self._nesting:
            ci, co = (self._pair(g) if self.dims[g].copied else self.dims[g].codes for g in (inner, outer))
            if not len(ci):
                self._nesting[key] = (True, None)
            else:
                last_outer = np.empty(int(ci.max()) + 1, dtype=np.int64)
                last_outer[ci] = co
                broken = np.flatnonzero(last_outer[ci] != co)
                if not len(broken):
                    self._nesting[key] = (True, None)
                else:
                    last_row = np.empty(int(ci.max()) + 1, dtype=np.int64)
                    last_row[ci] = np.arange(len(ci))
                    pair = np.array([broken[0], last_row[ci[broken[0]]]])
                    self._nesting[key] = (False, pair if co[pair[0]] != co[pair[1]] else None)
        return self._nesting[key]

    def hub_drawn(self, a: int, b: int, counts: np.ndarray) -> bool:
        """Whether the drawn rows hold a group of term ``a`` or ``b`` (one relabelled, one shared) that meets
        every drawn group of the other term, so that the two form one component: a relabelled group that
        meets every group of the shared term on the design's rows, once its level is drawn (all its rows
        come with it); or a shared group that meets every relabelled group, whatever is drawn (each drawn
        relabelled group brings its rows with the shared one)."""
        always, rows = self._hub(a, b)
        return always or bool(np.any(counts[self.levels[rows]] > 0))

    def _hub(self, a: int, b: int) -> tuple[bool, np.ndarray]:
        """For :meth:`hub_drawn`: whether the two terms always form one component, and rows (one per hub
        group of a relabelled term) any of which, drawn, makes them one."""
        if (a, b) not in self._hubs:
            always, rows = False, np.zeros(0, dtype=np.int64)
            for mine, other in ((a, b), (b, a)):
                cm, co = (self._pair(self.terms[i].groups) if self.copied[i] else self.dims[self.terms[i].groups].codes
                          for i in (mine, other))
                n_mine, n_other = int(cm.max()) + 1, int(co.max()) + 1
                if n_mine * n_other > HUB_CELLS:
                    continue
                table = np.zeros(n_mine * n_other, dtype=bool)
                table[cm * n_other + co] = True
                hubs = np.flatnonzero(table.reshape(n_mine, n_other).all(axis=1))
                if not len(hubs):
                    continue
                if self.copied[mine]:
                    first_row = np.full(n_mine, len(cm))
                    np.minimum.at(first_row, cm, np.arange(len(cm)))
                    rows = np.concatenate([rows, first_row[hubs]])  # drawn with its level
                elif self.copied[other]:
                    always = True
            self._hubs[(a, b)] = (always, rows)
        return self._hubs[(a, b)]

    def level_components(self, a: int, b: int) -> np.ndarray:
        """Per resampling level, the components of two relabelled terms on its rows (each copy's)."""
        if (a, b) not in self._level_components:
            pa, pb = self._pair(self.terms[a].groups), self._pair(self.terms[b].groups)
            na, nb = len(self.dims[self.terms[a].groups].pair_level), len(self.dims[self.terms[b].groups].pair_level)
            graph = sp.coo_array((np.ones(len(pa)), (pa, pb + na)), shape=(na + nb, na + nb))
            labels = csgraph.connected_components(graph, directed=False)[1]
            level_of_node = np.concatenate([self.dims[self.terms[a].groups].pair_level,
                                            self.dims[self.terms[b].groups].pair_level])
            first = np.unique(labels, return_index=True)[1]
            self._level_components[(a, b)] = np.bincount(level_of_node[first], minlength=self.n_levels)
        return self._level_components[(a, b)]


class _DrawState:
    """One draw's pieces of :class:`_CopiesDf`'s count."""

    def __init__(self, df: _CopiesDf, counts: np.ndarray, copies: np.ndarray, drawn: np.ndarray) -> None:
        self.df, self.counts, self.copies, self.drawn = df, counts, copies, drawn
        self.nlev = [self.levels_of(t.groups) for t in df.terms]
        self.twice = bool(np.any(copies > 1))
        self._ranks: dict[tuple[int, ...], int] = {}

    def codes(self, g: tuple[str, ...]) -> np.ndarray:
        """The variable's groups on the drawn rows (pairs for a relabelled one)."""
        dim = self.df.dims[g]
        return (dim.pair if dim.copied else dim.codes)[self.drawn]  # type: ignore[index]

    def dense(self, g: tuple[str, ...]) -> np.ndarray:
        """:meth:`codes` numbered densely."""
        dim = self.df.dims[g]
        return _dense(self.codes(g), len(dim.pair_level) if dim.pair_level is not None else dim.n)

    def levels_of(self, g: tuple[str, ...]) -> int:
        dim = self.df.dims[g]
        if dim.copied:
            assert dim.pair_level is not None
            return int(self.counts[dim.pair_level].sum())
        return int(np.count_nonzero(np.bincount(dim.codes[self.drawn], minlength=dim.n)))

    def nested(self, inner: tuple[str, ...], outer: tuple[str, ...]) -> bool:
        """Whether every group of ``inner`` lies within one group of ``outer`` on the stacked rows."""
        if not self.df.dims[inner].copied and self.df.dims[outer].copied:
            if self.twice:  # a level drawn twice: its shared groups are in two copies
                return False
            groups, levels = self.df._spans[inner]
            spans = np.bincount(groups, self.counts[levels])
            if np.any(spans > 1):  # a shared group in two copies or more
                return False
        nested, witness = self.df.nesting(inner, outer)
        if nested:  # nested on the design's rows: on the drawn rows too
            return True
        if witness is not None and bool(np.all(self.copies[witness] > 0)):  # two drawn rows break it
            return False
        return _nested(self.codes(inner), self.codes(outer))

    def rank(self, members: Sequence[int]) -> int:
        key = tuple(members)
        if key not in self._ranks:
            self._ranks[key] = self._count_rank(members)
        return self._ranks[key]

    def _count_rank(self, members: Sequence[int]) -> int:
        df, terms = self.df, self.df.terms
        total = 0
        for i in members:
            if df.has_slope[i]:
                if df.copied[i]:
                    ss = df._pair_ss[i]
                    pair_level = df.dims[terms[i].groups].pair_level
                    assert pair_level is not None
                    mult = self.counts[pair_level]
                    on = mult > 0
                    threshold = 1e-12 * (1 + ss[on].max()) if on.any() else 0.0
                    total += int(mult[ss > threshold].sum())
                else:
                    dim = df.dims[terms[i].groups]
                    codes = dim.codes[self.drawn]
                    assert df.time is not None
                    ss = _time_squares(df.time[self.drawn], codes, self.copies[self.drawn] * df.w[self.drawn], dim.n)
                    present = np.bincount(codes, minlength=dim.n) > 0
                    ss = ss[present]
                    total += int(np.count_nonzero(ss > 1e-12 * (1 + ss.max())))
        cats = sorted(members, key=lambda i: -self.nlev[i])
        for pos, i in enumerate(cats):
            total += self.nlev[i] - (1 if pos >= 2 else 0)
        if len(cats) >= 2:
            a, b = cats[0], cats[1]
            if df.copied[a] and df.copied[b]:
                total -= int(self.counts @ df.level_components(a, b))
            elif df.hub_drawn(a, b, self.counts):  # a group meeting every drawn group of the other term
                total -= 1
            else:
                ca, cb = self.dense(terms[a].groups), self.dense(terms[b].groups)
                total -= _components(ca, int(ca.max()) + 1, cb, int(cb.max()) + 1)
        for i in members:
            if not df.has_slope[i]:
                continue
            assert df.time is not None
            time = df.time[self.drawn]
            if any(j != i and not terms[j].has_slope and _constant_within(time, self.codes(terms[j].groups))
                   for j in members):
                total -= 1
        return total


class _LocalDummies:
    """The dummy columns of absorbed terms that cross the resampling levels, when they are too many to hold
    for every row (region-by-period effects): a level's rows meet few of them, so each row keeps only the
    dummies of its own level's groups (its level's ``slots``), made orthogonal to the nested terms once.
    A draw sums their cross products per level, weighted by the copies, into the systems of the connected
    parts of the groups that share a level (one per region), each solved by a pseudo-inverse."""

    def __init__(self, ids: np.ndarray, n_ids: int, level_of_row: np.ndarray, n_levels: int) -> None:
        n, t = ids.shape
        pairs = np.unique(np.repeat(level_of_row.astype(np.int64), t) * n_ids + ids.ravel())
        pair_level, pair_id = pairs // n_ids, pairs % n_ids
        per_level = np.bincount(pair_level, minlength=n_levels)
        self.k = int(per_level.max()) if len(per_level) else 0
        first = np.concatenate([[0], np.cumsum(per_level)[:-1]])
        rank = np.arange(len(pairs)) - first[pair_level]
        # each level's groups by slot, n_ids where a level has fewer
        self.slots = np.full((n_levels, self.k), n_ids, dtype=np.int64)
        self.slots[pair_level, rank] = pair_id
        self.n_ids = n_ids
        slot = np.searchsorted(pairs, np.repeat(level_of_row.astype(np.int64), t) * n_ids + ids.ravel())
        self.rows = np.zeros((n, self.k))
        self.rows[np.repeat(np.arange(n), t), rank[slot]] = 1.0
        self.level_of_row = level_of_row
        # the connected parts of the groups (linked by the levels they share), and each part's block
        graph = sp.coo_array((np.ones(len(pairs)), (pair_id, pair_level + n_ids)), shape=(n_ids + n_levels,) * 2)
        labels = csgraph.connected_components(graph, directed=False)[1]
        parts = np.unique(labels[:n_ids], return_inverse=True)[1].ravel()
        self.sizes = np.bincount(parts)
        order = np.argsort(parts, kind="stable")
        local = np.empty(n_ids, dtype=np.int64)
        local[order] = np.arange(n_ids) - np.repeat(np.concatenate([[0], np.cumsum(self.sizes)[:-1]]), self.sizes)
        self.offsets = np.concatenate([[0], np.cumsum(self.sizes * self.sizes)[:-1]])
        self.n_entries = int((self.sizes * self.sizes).sum())
        self.members = np.split(order, np.cumsum(self.sizes)[:-1])
        a, b = self.slots[:, :, None], self.slots[:, None, :]
        real = (a < n_ids) & (b < n_ids)
        pa, la, lb = parts[np.minimum(a, n_ids - 1)], local[np.minimum(a, n_ids - 1)], local[np.minimum(b, n_ids - 1)]
        self.entry = np.where(real, self.offsets[pa] + la * self.sizes[pa] + lb, self.n_entries)

    def solve(self, weighted: np.ndarray, m: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """From the per-level cross products weighted by the copies ``(levels, q, q)`` (the ``m`` columns,
        then the slots): the cross products of the columns, those of the groups with the columns
        ``(groups, m)`` and ``Gamma`` (groups, m), the columns' coefficients on the groups."""
        zz = weighted[:, :m, :m].sum(axis=0)
        flat = (self.slots[:, :, None] * m + np.arange(m)).ravel()  # the padding slots land past the groups
        dz = np.bincount(flat, weighted[:, m:, :m].ravel(), minlength=(self.n_ids + 1) * m)
        dz = dz[: self.n_ids * m].reshape(self.n_ids, m)
        blocks = np.bincount(self.entry.ravel(), weighted[:, m:, m:].ravel(), minlength=self.n_entries + 1)
        inverses = _pinv_many([blocks[o: o + k * k].reshape(k, k) for o, k in zip(self.offsets, self.sizes)])
        gamma = np.zeros((self.n_ids, m))
        for members, inverse in zip(self.members, inverses):
            gamma[members] = inverse @ dz[members]
        return zz, dz, gamma

    def set_rows(self, rows: np.ndarray) -> None:
        """The rows' local dummies made orthogonal to the nested terms, held as a sparse (rows, groups) matrix
        (a padding slot points past the groups)."""
        self.rows = rows
        n = len(rows)
        self.matrix = sp.csr_array((rows.ravel(), (np.repeat(np.arange(n), self.k),
                                                   self.slots[self.level_of_row].ravel())), shape=(n, self.n_ids + 1))

    def correction(self, g: np.ndarray) -> np.ndarray:
        """``D g`` on the rows for the groups' values ``g`` (groups,) or (groups, k)."""
        return self.matrix @ np.concatenate([g, np.zeros((1, *g.shape[1:]))])


#: Rounds of closed-form updates of a Poisson PML draw's effects before its iterations start (see
#: :func:`_effects_updated`; on the demo grid one round takes a fifth off Poisson PML's draws, more do not help).
START_ROUNDS = 1


def _effects_updated(start: np.ndarray, y: np.ndarray, w: np.ndarray, codes: Sequence[np.ndarray],
                     rounds: int) -> np.ndarray:
    """The linear predictor ``start`` with each categorical effect moved, term after term, to the value that
    solves its own score equations with everything else held (``sum_g w (y - mu) = 0`` in each group: a
    shift of ``log(sum w y / sum w mu)``): a start for Poisson PML much nearer a draw's fit than the
    design's, whose group effects the draw's copies move (zero groups were dropped: every group holds a
    positive outcome; the start itself if a value overflows)."""
    eta = np.array(start, dtype=float)
    wy = w * y
    for _ in range(rounds):
        for g in codes:
            n = int(g.max()) + 1
            top = np.bincount(g, wy, minlength=n)
            bottom = np.bincount(g, w * np.exp(eta), minlength=n)
            shift = np.log(np.divide(top, bottom, out=np.ones(n), where=(top > 0) & (bottom > 0)))
            eta += shift[g]
    return eta if np.all(np.isfinite(eta)) else np.asarray(start, dtype=float)


def _pinv_stacked(stack: np.ndarray) -> np.ndarray:
    """The pseudo-inverse of each symmetric matrix of a stack (..., k, k), by the rule of
    :func:`fegrid.absorb._pinv`: eigenvalues below 1e-12 of the matrix's largest count as zero."""
    eigval, eigvec = np.linalg.eigh(stack)
    ok = eigval > 1e-12 * np.maximum(eigval.max(axis=-1), 1e-300)[..., None]
    inverse = np.divide(1.0, eigval, out=np.zeros_like(eigval), where=ok)
    return (eigvec * inverse[..., None, :]) @ np.swapaxes(eigvec, -1, -2)


class _Unsupported(Exception):
    """A block or design that the reweighting does not handle: it takes the stacked refit."""


def _dense(codes: np.ndarray, n: int) -> np.ndarray:
    present = np.zeros(n, dtype=bool)
    present[codes] = True
    return (np.cumsum(present) - 1)[codes]


@dataclass
class _Dim:
    """Codes of a column combination on a design's rows, and how its copies are labelled."""

    codes: np.ndarray  # dense codes on the rows
    n: int
    copied: bool  # the stacked panel relabels it per copy (it holds the unit or the resampling column)
    local: np.ndarray | None = None  # copied: dense rank of the code within its resampling level
    per_level: np.ndarray | None = None  # copied: distinct codes per resampling level
    pair: np.ndarray | None = None  # copied: dense code of (resampling level, code) on the rows
    pair_level: np.ndarray | None = None  # copied: the resampling level of each pair

    def stacked(self, rows: np.ndarray, position: np.ndarray, picks: np.ndarray) -> np.ndarray:
        """Dense codes on stacked rows (``rows`` index the design's rows)."""
        if not self.copied:
            return _dense(self.codes[rows], self.n)
        assert self.local is not None and self.per_level is not None
        offsets = np.concatenate([[0], np.cumsum(self.per_level[picks])[:-1]])
        return offsets[position] + self.local[rows]


class _DesignRows:
    """The rows of one complete-case group of a block, singletons dropped as the engine drops them, with what
    tells whether a draw's stacked rows drop exactly the copies of the rows dropped here."""

    def __init__(self, frame: pd.DataFrame, positions: np.ndarray, cc: np.ndarray, settings: BlockSettings,
                 levels: np.ndarray, n_levels: int, copied: set[str]) -> None:
        self.settings = settings
        self.n_frame = len(frame)
        cc_pos = positions[cc]
        sub = frame.iloc[cc_pos]
        self.check_singletons = bool(settings.absorb) and not settings.keep_singletons
        keep = (drop_singletons(sub, settings.absorb, codes_of=LevelCodes(sub))
                if self.check_singletons else np.ones(len(sub), dtype=bool))
        if not keep.any():
            raise _Unsupported("no rows")
        self.rows = sub.loc[keep]
        self.cc_index = np.full(len(frame), -1, dtype=np.int64)
        self.cc_index[cc_pos] = np.arange(len(cc_pos))
        self.base_index = np.full(len(frame), -1, dtype=np.int64)
        self.base_index[cc_pos[keep]] = np.arange(int(keep.sum()))
        self.cc_keep = keep
        self.levels = levels[cc_pos[keep]]
        self.n_levels = n_levels
        self.copied = copied
        cc_codes = LevelCodes(sub)
        self.cc_levels = levels[cc_pos]
        self._cc_dims = {t.groups: self._dim(cc_codes(t.groups), self.cc_levels, t.groups) for t in settings.absorb}
        # a design without singletons whose copied terms lie within resampling levels keeps each copy's
        # counts: only the levels of terms shared by the copies can be left alone in a draw
        self.quick_singletons = bool(keep.all()) and all(
            _nested(dim.codes, self.cc_levels) for dim in self._cc_dims.values() if dim.copied)

    def _note_adoption(self, cohorts: Cohorts) -> None:
        """Per resampling level, its rows' periods and its units adopting inside them (the engine's count of
        cohorts), for :meth:`_holds_adoption`."""
        period = cohorts.period.astype(np.int64)
        self.periods_of_level = np.zeros((self.n_levels, int(period.max()) + 1))
        self.periods_of_level[self.levels, period] = 1.0
        first = np.unique(cohorts.unit, return_index=True)[1]  # each unit's first row (cohorts are the unit's)
        adopts = np.isfinite(cohorts.cohort[first]) & (cohorts.cohort[first] > 0)
        self.adopters_of_level = np.bincount(self.levels[first], adopts, minlength=self.n_levels)

    def _holds_adoption(self, counts: np.ndarray) -> np.ndarray:
        """Per draw (``counts``: draws x levels), whether it holds a row of every period of the design's rows
        (so that the copies' cohorts and relative periods, positions among the periods, are the rows' own)
        and an adopting unit (else the stacked fit refuses, and says why)."""
        return np.all(counts @ self.periods_of_level > 0, axis=1) & (counts @ self.adopters_of_level > 0)

    def _dim(self, codes: np.ndarray, levels: np.ndarray, columns: tuple[str, ...]) -> _Dim:
        n = int(codes.max()) + 1 if len(codes) else 0
        if not self.copied.intersection(columns):
            return _Dim(codes, n, False)
        pair = levels.astype(np.int64) * max(n, 1) + codes
        uniq, inverse = np.unique(pair, return_inverse=True)
        first_of_level = np.searchsorted(uniq // max(n, 1), np.arange(self.n_levels))
        local = inverse - first_of_level[levels]
        per_level = np.bincount(uniq // max(n, 1), minlength=self.n_levels)
        return _Dim(codes, n, True, local.astype(np.int64), per_level, inverse.astype(np.int64), uniq // max(n, 1))

    def _singletons_agree(self, draw: Draw) -> bool:
        """Whether the stacked draw drops exactly the copies of the rows the original design drops."""
        if not self.check_singletons:
            return True
        if self.quick_singletons:  # no level of a term shared by the copies is left alone: nothing changes
            copies = draw.counts[self.cc_levels]
            if all(not np.any(np.bincount(dim.codes, copies, minlength=dim.n) == 1)
                   for dim in self._cc_dims.values() if not dim.copied):
                return True
        cc = self.cc_index[draw.rows]
        on = cc >= 0
        rows, position = cc[on], draw.position[on]
        codes = {g: dim.stacked(rows, position, draw.picks) for g, dim in self._cc_dims.items()}
        frame = pd.DataFrame(index=pd.RangeIndex(len(rows)))
        keep = drop_singletons(frame, self.settings.absorb, codes_of=lambda g: codes[g])
        return bool(np.array_equal(keep, self.cc_keep[rows]))


class _Design(_DesignRows):
    """One complete-case group of a block's least-squares, 2SLS and Poisson PML specifications, prepared
    once per chunk of draws."""

    def __init__(self, frame: pd.DataFrame, positions: np.ndarray, cc: np.ndarray, specs: list[Spec],
                 settings: BlockSettings, levels: np.ndarray, n_levels: int, copied: set[str],
                 observed: Mapping[str, float]) -> None:
        super().__init__(frame, positions, cc, settings, levels, n_levels, copied)
        # two-way event studies: least squares on their indicators, reparametrized (_as_least_squares); a
        # draw must keep every one of their regressors and pass the stacked fit's rule, or takes the stacked refit
        rows, specs, self.strict, cohorts, self.shares = _as_least_squares(self.rows, specs, settings)
        self.specs = specs
        codes = LevelCodes(rows)
        dims = {t.groups for t in settings.absorb} | {sh.share_dim for sh in self.shares.values()}
        for s in specs:
            by = s.inference.by
            dims.update(by)
            if len(by) == 2:
                dims.add(by[0] + by[1])
        self.dims = {d: self._dim(codes(d), self.levels, d) for d in dims}
        self.time = rows[settings.time].to_numpy(dtype=float) if settings.time and settings.time in rows else None
        self.w = rows[settings.weights].to_numpy(dtype=float) if settings.weights else np.ones(len(rows))
        self.unit_weights = bool(np.all(self.w == 1.0))
        self.columns = sorted({c for s in specs for c in (s.outcome, s.focal, *s.controls, *s.estimator.columns())})
        self.pos = {c: j for j, c in enumerate(self.columns)}
        raw = rows[self.columns].to_numpy(dtype=float)
        if not np.all(np.isfinite(raw)) or not np.all(np.isfinite(raw @ np.ones(raw.shape[1]))):
            raise _Unsupported("infinite values")
        self.raw = raw
        # Poisson PML: each specification's outcome with its null imposed (the stacked path's column, row by row)
        self.null = {s.spec_id: raw[:, self.pos[s.outcome]] * np.exp(-observed[s.spec_id] * raw[:, self.pos[s.focal]])
                     for s in specs if s.estimator.method == POISSON}
        self.term_codes = {t.groups: codes(t.groups) for t in settings.absorb}
        self.start = {s.spec_id: self._poisson_start(s) for s in specs if s.estimator.method == POISSON}
        self.raw_centred = raw - raw.mean(axis=0)
        self.raw_squared = self.raw_centred**2
        self.raw_scale = 1.0 + np.max(np.abs(self.raw_centred), axis=0)
        # nested terms are projected out once; the others become dummy columns partialled per draw
        absorber = Absorber(rows, settings.absorb, weights=self.w if settings.weights else None, time=settings.time,
                            tolerance=settings.tolerance, max_iterations=settings.max_iterations, codes_of=codes)
        nested, others = [], []
        for i in absorber._active if settings.absorb else []:
            (nested if _nested(absorber._codes[i], self.levels) else others).append(i)
        dummies: list[np.ndarray] | None = [] if nested else [np.ones((len(rows), 1))]
        if (any(settings.absorb[i].has_slope for i in others)  # a trend across copies: no dummy columns
                or (0 if nested else 1) + sum(absorber._nlev[i] - 1 for i in others) > MAX_DUMMIES):
            dummies, others = None, []
        for i in others:
            assert dummies is not None
            c, n = absorber._codes[i], absorber._nlev[i]
            block = np.zeros((len(rows), n - 1))
            hit = c > 0
            block[np.flatnonzero(hit), c[hit] - 1] = 1.0
            dummies.append(block)
        d = None if dummies is None else np.hstack(dummies) if dummies else np.zeros((len(rows), 0))
        # with many dummy columns, each row keeps those of its resampling level's groups (_LocalDummies) or,
        # failing that, each draw demeans the drawn rows, weighted by their copies
        self.level_ids = np.unique(self.levels)
        level_of_row = np.searchsorted(self.level_ids, self.levels)
        if cohorts is not None:
            self._note_adoption(cohorts)
        # interaction-weighted estimates: each resampling level's rows per cell (a draw's cell counts)
        self.level_cells: dict[str, np.ndarray] = {}
        for spec_id, sh in self.shares.items():
            on = sh.cell_of_row >= 0
            table = np.zeros((n_levels, len(sh.post)))
            np.add.at(table, (self.levels[on], sh.cell_of_row[on]), 1.0)
            self.level_cells[spec_id] = table
        self.local: _LocalDummies | None = None
        crossing = [i for i in (absorber._active if settings.absorb else []) if i not in nested]
        if d is None and nested and crossing and not any(settings.absorb[i].has_slope for i in crossing):
            offsets = np.concatenate([[0], np.cumsum([absorber._nlev[i] for i in crossing])])
            local = _LocalDummies(np.column_stack([offsets[j] + absorber._codes[i] for j, i in enumerate(crossing)]),
                                  int(offsets[-1]), level_of_row, len(self.level_ids))
            q = raw.shape[1] + local.k
            if (local.k <= MAX_DUMMIES and int(local.sizes.max()) <= LOCAL_MAX_PART
                    and len(self.level_ids) * q * q <= MAX_CROSS_CELLS):
                self.local, d = local, local.rows
        self.reweighted = d is None
        if self.reweighted:
            self.within = self.dummies = np.zeros((len(rows), 0))
        else:
            assert d is not None
            both = np.asfortranarray(np.hstack([raw, d]))
            if nested:
                inner = Absorber(rows, tuple(settings.absorb[i] for i in nested),
                                 weights=self.w if settings.weights else None, time=settings.time,
                                 tolerance=settings.tolerance, max_iterations=settings.max_iterations, codes_of=codes)
                both = inner.demean(both).values
            self.within = np.ascontiguousarray(both[:, : raw.shape[1]])
            self.dummies = np.ascontiguousarray(both[:, raw.shape[1]:])
            if self.local is not None:  # the local dummies made orthogonal to the nested terms
                self.local.set_rows(self.dummies)
        self.ident_tol = max(1e-9, 1e3 * settings.tolerance)
        # least squares and 2SLS: a draw weights the rows by their copies (see _refit_weighted); with the
        # dummy columns, from the rows' columns and cross products summed per resampling level once
        self.copies_df = _CopiesDf(self)
        self._cluster_matrices: dict[tuple[str, ...], sp.csr_array] = {}
        self._local_maps: tuple[np.ndarray, sp.csr_array, sp.csr_array] | None = None
        self.by_sets = sorted({s.inference.by for s in specs})
        self.u = self.cross = None
        if not self.reweighted and self.dummies.shape[1]:
            self.within = self._partialled(self.within, level_of_row)
        if not self.reweighted:
            self.u = np.ascontiguousarray(np.hstack([self.within, self.dummies]))
            self.cross = _cross_per_level(self.u, self.w, level_of_row, len(self.level_ids),
                                          MAX_CROSS_CELLS_STAGGERED if self.strict else MAX_CROSS_CELLS)
            if self.local is not None and self.cross is None:  # too large: each draw demeans the drawn rows
                self.reweighted, self.local, self.u = True, None, None
                self.within = self.dummies = np.zeros((len(rows), 0))

    def _partialled(self, within: np.ndarray, level_of_row: np.ndarray) -> np.ndarray:
        """The columns with the dummies partialled out on the design's own rows (each row once), twice: the
        second pass recovers the digits the normal equations lose. A draw's partialling is then a small
        correction, which its cross products give to full precision even for nearly collinear columns."""
        m = within.shape[1]
        for _ in range(2):
            if self.local is not None:
                q = m + self.local.k
                cross = _cross_per_level(np.hstack([within, self.dummies]), self.w, level_of_row, len(self.level_ids))
                if cross is None:
                    return within
                gamma = self.local.solve(cross.reshape(-1, q, q), m)[2]
                within = within - self.local.correction(gamma)
            else:
                d = self.dummies
                dw = d * self.w[:, None]
                dd = d.T @ dw
                eigval, eigvec = np.linalg.eigh((dd + dd.T) / 2)
                ok = eigval > 1e-12 * max(float(eigval.max()), 1e-300)
                within = within - d @ (((eigvec[:, ok] / eigval[ok]) @ eigvec[:, ok].T) @ (dw.T @ within))
        return np.ascontiguousarray(within)

    def refit(self, draw: Draw) -> list[tuple[str, float, float, float]] | None:
        """``(spec_id, estimate, std_error, df)`` per specification, or ``None`` to take the stacked refit."""
        if not self._singletons_agree(draw):
            return None
        return self._refit_weighted(draw)

    @property
    def batched_specs(self) -> list[Spec]:
        """The specifications that :meth:`refit_many` refits for the draws together: least squares, when the
        design refits from its stored columns (and local dummies) and their cross products summed per
        resampling level; none otherwise."""
        if self.u is None or self.cross is None or self.reweighted:
            return []
        return [s for s in self.specs if s.estimator.method == LEAST_SQUARES]

    def refit_many(self, draws: Sequence[Draw]) -> list[list[tuple[str, float, float, float]] | None]:
        """:meth:`refit` of each draw. The least-squares specifications (:attr:`batched_specs`) are refitted
        for the draws together, each step one batched product for all of them (the same formulas, summed in
        another order); the design's 2SLS and Poisson PML specifications, draw by draw. A draw whose
        identification decisions differ from the batch's, or lie near a threshold, takes :meth:`refit`."""
        batched = self.batched_specs
        if not batched:
            return [self.refit(d) for d in draws]
        others = [s for s in self.specs if s.estimator.method != LEAST_SQUARES]
        order = {s.spec_id: k for k, s in enumerate(self.specs)}
        out: list[list[tuple[str, float, float, float]] | None] = [None] * len(draws)
        # a draw with no copy of the design's rows, or whose singletons change, gives None (see refit)
        todo = [i for i, d in enumerate(draws) if d.counts[self.levels].any() and self._singletons_agree(d)]
        size = max(1, BATCH_CELLS // (8 * len(self.w)))
        for start in range(0, len(todo), size):
            part = todo[start: start + size]
            got = self._refit_batch([draws[i] for i in part], batched)
            for i, g in zip(part, got):
                if g is None:
                    out[i] = self._refit_weighted(draws[i])
                    continue
                rest = self._refit_weighted(draws[i], others) if others else []
                # None: one of the others takes the stacked refit, and with it the whole design (as refit)
                out[i] = None if rest is None else sorted(g + rest, key=lambda r: order[r[0]])
        return out

    def _refit_batch(self, draws: Sequence[Draw], specs: Sequence[Spec]
                     ) -> list[list[tuple[str, float, float, float]] | None]:
        """:meth:`_refit_weighted` of the least-squares ``specs`` for draws together: ``None`` for a draw to refit
        alone."""
        assert self.u is not None and self.cross is not None
        nan = float("nan")
        d_count, m, q = len(draws), len(self.columns), self.u.shape[1]
        counts = np.stack([d.counts for d in draws]).astype(float)
        copies = counts[:, self.levels]
        # the raw columns' spread (as _raw_norm): a nearly constant column takes the draw's own refit
        cw = copies * self.w
        total = cw.sum(axis=1)
        first = cw @ self.raw_centred
        raw_norm = np.sqrt(np.maximum(cw @ self.raw_squared - first * first / total[:, None], 0.0))
        alone = np.any(raw_norm <= 1e-6 * np.sqrt(total)[:, None] * self.raw_scale, axis=1)
        # the draws' cross products, and the dummy columns partialled out of them (as _refit_weighted)
        transform = local_gamma = None
        if self.local is not None:  # the crossing groups' dummies partialled out part by part, draw by draw
            gram, local_gamma = self._batch_local(counts[:, self.level_ids])
        else:
            big = (counts[:, self.level_ids] @ self.cross).reshape(d_count, q, q)
            big = (big + big.transpose(0, 2, 1)) / 2
            gram = big[:, :m, :m]
            if q > m:
                gamma = _pinv_stacked(big[:, m:, m:]) @ big[:, m:, :m]
                gram = gram - big[:, :m, m:] @ gamma
                transform = np.concatenate([np.broadcast_to(np.eye(m), (d_count, m, m)), -gamma], axis=1)
        gram = (gram + gram.transpose(0, 2, 1)) / 2
        norm = np.sqrt(np.maximum(np.diagonal(gram, axis1=1, axis2=2), 0.0))
        if self.strict:
            self._event_study_checks(counts, gram, alone)
        results: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
        fits: dict[tuple[object, ...], _Batch | None] = {}
        absorbed: np.ndarray | None = None
        nested: dict[tuple[tuple[str, ...], ...], np.ndarray] = {}
        copies_t: np.ndarray | None = None  # (rows, draws)
        for spec in specs:
            key = (spec.outcome, spec.focal, spec.controls)
            combine = None
            if spec.spec_id in self.shares:  # the draws' aggregation weights: cells from adoption on, by count
                post = counts @ self.level_cells[spec.spec_id] * self.shares[spec.spec_id].post
                total = post.sum(axis=1)
                alone |= ~(total > 0)
                combine = np.zeros((d_count, 1 + len(spec.controls)))
                combine[:, : post.shape[1]] = post / np.where(total > 0, total, 1.0)[:, None]
            if key not in fits:
                fits[key] = self._batch_regression(spec, gram, norm, raw_norm, alone, (transform, local_gamma),
                                                   combine)
            fit = fits[key]
            if spec.spec_id in self.strict and (fit is None or len(fit.idx) != 1 + len(spec.controls)):
                alone[:] = True  # an event study's regressor left out: the stacked fit decides (not identified)
                fit = None
            if fit is None:  # not identified in these draws (those deciding otherwise take their own refit)
                results[spec.spec_id] = (np.full(d_count, nan), np.full(d_count, nan), np.full(d_count, nan))
                continue
            if absorbed is None:  # the effects' df on each draw's stacked rows, counted from the copies
                absorbed = np.zeros(d_count)
                nested = {by: np.zeros(d_count) for by in self.by_sets}
                live = np.flatnonzero(~alone)
                got, per_by = self.copies_df.count_many([draws[i] for i in live], counts[live], self.by_sets)
                absorbed[live] = got
                for by, v in per_by.items():
                    nested[by][live] = v
            assert absorbed is not None
            if copies_t is None:
                copies_t = np.ascontiguousarray(copies.T)
            results[spec.spec_id] = self._batch_inference(spec, fit, copies_t, counts, absorbed,
                                                          nested[spec.inference.by])
            if spec.spec_id in self.shares:
                results[spec.spec_id] = self._with_shares(spec, fit, results[spec.spec_id], copies_t, counts, alone)
        out: list[list[tuple[str, float, float, float]] | None] = []
        for i in range(d_count):
            if alone[i]:
                out.append(None)
                continue
            out.append([(s.spec_id, float(results[s.spec_id][0][i]), float(results[s.spec_id][1][i]),
                         float(results[s.spec_id][2][i])) for s in specs])
        return out

    def _event_study_checks(self, counts: np.ndarray, gram: np.ndarray, alone: np.ndarray) -> None:
        """Mark in ``alone`` the draws whose event studies the reparametrized least squares cannot vouch for:
        a draw without some period of the design's rows (the cohorts' positions would shift), or whose
        indicators and controls come near the stacked fit's rule (a column's norm at most 1e-9 of the
        largest, or the least eigenvalue of their correlation matrix at most 1e-10: not identified), with
        a margin of 100. Those draws take :meth:`_refit_weighted`, which leaves event studies to the stacked
        refit."""
        alone |= ~self._holds_adoption(counts)
        for columns, t in self.strict.values():
            live = np.flatnonzero(~alone)
            if not len(live):
                return
            idx = [self.pos[c] for c in columns]
            full = np.eye(len(idx))
            full[: len(t), : len(t)] = t
            g = full.T @ gram[live][:, idx][:, :, idx] @ full  # the indicators' (and controls') cross products
            nrm = np.sqrt(np.maximum(np.diagonal(g, axis1=1, axis2=2), 0.0))
            with np.errstate(divide="ignore", invalid="ignore"):
                ratio = nrm.min(axis=1) / nrm.max(axis=1)
                corr = g / (nrm[:, :, None] * nrm[:, None, :])
            fine = ratio > 1e-9 * MARGIN
            if fine.any():
                least = np.full(len(live), -np.inf)
                least[fine] = np.linalg.eigvalsh(corr[fine]).min(axis=1)
                fine &= least > 1e-10 * MARGIN
            alone[live[~fine]] = True

    def _batch_decide(self, j: int, kept: Sequence[int], norm: np.ndarray, raw_norm: np.ndarray, gram: np.ndarray,
                      alone: np.ndarray) -> bool | None:
        """Whether column ``j`` is kept (not absorbed, and not collinear with ``kept``) in the draws, by the
        rules of :meth:`_absorbed` and :meth:`_collinear`: the draws' common decision; a draw near a
        threshold, or deciding otherwise, is marked in ``alone`` (``None``: no draw left)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = norm[:, j] / raw_norm[:, j]
        alone |= (self.ident_tol / MARGIN < ratio) & (ratio < self.ident_tol * MARGIN)
        live = np.flatnonzero(~alone)
        if not len(live):
            return None
        absorbed = ratio[live] <= self.ident_tol
        common = bool(np.count_nonzero(absorbed) * 2 > len(live))
        alone[live[absorbed != common]] = True
        if common or not kept:
            return not common
        live = np.flatnonzero(~alone)
        ks = list(kept)
        g = gram[live]
        try:
            solved = np.linalg.solve(g[:, ks][:, :, ks], g[:, ks, j][:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            alone[live] = True
            return None
        r2 = g[:, j, j] - np.einsum("dk,dk->d", g[:, j, ks], solved)
        with np.errstate(divide="ignore", invalid="ignore"):
            alone[live[~(np.sqrt(np.maximum(r2, 0.0)) / norm[live, j] >= 1e-4)]] = True
        return True

    def _batch_regression(self, spec: Spec, gram: np.ndarray, norm: np.ndarray, raw_norm: np.ndarray,
                          alone: np.ndarray, basis: tuple[np.ndarray | None, np.ndarray | None],
                          combine: np.ndarray | None = None) -> _Batch | None:
        """:meth:`_regression` on the draws not marked ``alone`` (``None``: the focal regressor is absorbed).
        With ``combine`` (draws, regressors in the specification's order), the estimate is that combination of
        the coefficients and ``h`` its row of ``B X'`` (every regressor must then be kept)."""
        kept: list[int] = []
        j = self.pos[spec.focal]
        if spec.spec_id in self.strict:  # every regressor: the stacked fit's own rule was checked on these draws
            kept = [self.pos[c] for c in spec.controls]
        else:
            for c in spec.controls:
                keep = self._batch_decide(self.pos[c], kept, norm, raw_norm, gram, alone)
                if keep:
                    kept.append(self.pos[c])
            if not self._batch_decide(j, kept, norm, raw_norm, gram, alone):
                return None
        idx = [j, *kept]
        live = np.flatnonzero(~alone)
        y = self.pos[spec.outcome]
        g = gram[live]
        try:
            bread = np.linalg.inv(g[:, idx][:, :, idx])
        except np.linalg.LinAlgError:
            alone[live] = True
            return None
        beta = (bread @ g[:, idx, y][:, :, None])[:, :, 0]
        ev = np.zeros((len(live), len(self.columns)))
        ev[:, y] = 1.0
        ev[:, idx] -= beta
        hv = np.zeros_like(ev)
        memo: dict[object, Any] = {}
        if combine is not None and len(idx) == combine.shape[1]:
            a = combine[live]
            hv[:, idx] = (bread @ a[:, :, None])[:, :, 0]
            estimate = (beta * a).sum(axis=1)
            memo["coefficients"] = beta
        else:
            hv[:, idx] = bread[:, :, 0]
            estimate = beta[:, 0]
        own = tuple(None if b is None else b[live] for b in basis)
        on_rows = self._batch_rows(own, np.stack([ev, hv], axis=2))
        return _Batch(live, idx, bread, estimate, on_rows[:, :, 0], on_rows[:, :, 1], own, memo)

    def _batch_rows(self, basis: tuple[np.ndarray | None, np.ndarray | None], v: np.ndarray) -> np.ndarray:
        """``z @ v`` on the rows for each draw (as :meth:`_Weighted.at`): ``v`` (draws, m, r) gives (rows,
        draws, r); ``basis`` holds the draws' combinations of the stored columns (``z = u @ transform``) or
        their local dummies' coefficients (``z = within - D gamma``), or neither (``z = u``)."""
        transform, gamma = basis
        d_count, m, r = v.shape
        if gamma is not None:
            assert self.local is not None
            flat = (self.within @ v.transpose(1, 0, 2).reshape(m, -1)).reshape(len(self.w), d_count, r)
            g = (gamma @ v).transpose(1, 0, 2).reshape(gamma.shape[1], -1)
            return flat - self.local.correction(g).reshape(len(self.w), d_count, r)
        assert self.u is not None
        if transform is not None:
            v = transform @ v
        return (self.u @ v.transpose(1, 0, 2).reshape(v.shape[1], -1)).reshape(len(self.w), d_count, r)

    def _batch_local(self, counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`_LocalDummies.solve` for draws together, from their copies of each level (draws, levels): the
        columns' cross products with the local dummies partialled out (draws, m, m), and the columns'
        coefficients on the groups (draws, groups, m)."""
        assert self.local is not None and self.cross is not None
        local, m = self.local, len(self.columns)
        if self._local_maps is None:  # the per-level sums laid out once: each entry a level's share
            q = m + local.k
            per_level = self.cross.reshape(-1, q, q)
            per_level = (per_level + per_level.transpose(0, 2, 1)) / 2
            n_levels = len(per_level)
            levels = np.arange(n_levels)
            flat = (local.slots[:, :, None] * m + np.arange(m)).reshape(n_levels, -1)
            dz = sp.csr_array((per_level[:, m:, :m].reshape(n_levels, -1).ravel(),
                               (flat.ravel(), np.repeat(levels, flat.shape[1]))),
                              shape=((local.n_ids + 1) * m, n_levels))
            entry = local.entry.reshape(n_levels, -1)
            blocks = sp.csr_array((per_level[:, m:, m:].reshape(n_levels, -1).ravel(),
                                   (entry.ravel(), np.repeat(levels, entry.shape[1]))),
                                  shape=(local.n_entries + 1, n_levels))
            self._local_maps = (per_level[:, :m, :m].reshape(n_levels, -1), dz, blocks)
        zz_map, dz_map, blocks_map = self._local_maps
        d_count = len(counts)
        zz = (counts @ zz_map).reshape(d_count, m, m)
        dz = (dz_map @ counts.T)[: local.n_ids * m].T.reshape(d_count, local.n_ids, m)
        blocks = (blocks_map @ counts.T).T
        gamma = np.zeros_like(dz)
        by_size: dict[int, list[int]] = {}
        for k, size in enumerate(local.sizes):
            by_size.setdefault(int(size), []).append(k)
        for size, parts in by_size.items():
            members = np.stack([local.members[k] for k in parts])  # (parts, size)
            starts = local.offsets[parts]
            cells = (starts[:, None] + np.arange(size * size)).reshape(len(parts), size, size)
            stack = blocks[:, cells]  # (draws, parts, size, size)
            gamma[:, members] = _pinv_stacked((stack + stack.transpose(0, 1, 3, 2)) / 2) @ dz[:, members]
        return zz - dz.transpose(0, 2, 1) @ gamma, gamma

    def _batch_inference(self, spec: Spec, fit: _Batch, copies: np.ndarray, counts: np.ndarray, absorbed: np.ndarray,
                         nested: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """:meth:`_weighted_inference` of one covariance choice for the draws of ``fit``: estimates, SEs and
        df over all the batch's draws (NaN where not computed). What several covariance choices of one
        regression share (sums over the rows, cluster sums) is computed once (``fit.memo``); ``copies`` (rows,
        draws)."""
        d_count = copies.shape[1]
        kind = covariance_kind(spec.inference.kind)
        live = fit.draws
        memo = fit.memo

        def once(key: object, make: Any) -> Any:
            if key not in memo:
                memo[key] = make()
            return memo[key]

        c = once("copies", lambda: copies if len(live) == d_count else copies[:, live])  # (rows, draws)
        n = once("n", lambda: c.sum(axis=0))
        p = len(fit.idx)
        e = fit.e
        w = None if self.unit_weights else self.w[:, None]
        cl = counts[live]
        bad = np.zeros(len(live), dtype=bool)
        with np.errstate(divide="ignore", invalid="ignore"):
            dof = kind.residual_df(n, p, absorbed[live], nested[live])
            if isinstance(kind, Iid):
                sse = once("sse", lambda: (c * (e * e if w is None else w * e * e)).sum(axis=0))
                variance = kind.scaled(sse, n, dof) * fit.bread[:, 0, 0]
                df = dof
            elif isinstance(kind, TwoWay):

                def scores() -> np.ndarray:
                    select = np.zeros((len(self.columns), p))
                    select[fit.idx, np.arange(p)] = 1.0
                    zx = self._batch_rows(fit.basis, np.broadcast_to(select, (len(live), *select.shape)))
                    return zx * (e if w is None else w * e)[:, :, None]

                by = spec.inference.by
                meat = np.zeros((len(live), p, p))
                groups = []
                for dim, sign in zip((by[0], by[1], by[0] + by[1]), TWO_WAY_SIGNS):
                    part, g = once(("two-way", dim),
                                   lambda dim=dim: self._batch_meat(dim, once("scores", scores), c, cl))
                    bad |= g < 2
                    meat += np.where((g < 2)[:, None, None], 0.0, sign * kind.scaled(part, n, dof, g))
                    groups.append(g)
                bad |= dof <= 0
                meat[bad] = 0.0
                v = fit.bread @ meat @ fit.bread
                v = clip_negative((v + v.transpose(0, 2, 1)) / 2)[0]
                variance, df = v[:, 0, 0], kind.inference_df(dof, groups)
            else:
                he = once("he", lambda: fit.h * e if w is None else w * fit.h * e)
                if isinstance(kind, Robust):
                    variance, df = kind.scaled(once("robust", lambda: (c * he * he).sum(axis=0)), n, dof), dof
                else:
                    assert isinstance(kind, OneWay)
                    dim = spec.inference.by[0]

                    def one_way() -> tuple[np.ndarray, np.ndarray]:
                        sums, mult, groups = self._batch_cluster_sums(dim, he, c, cl)
                        return (sums * sums * mult.T).sum(axis=0), groups

                    squares, g = once(("one-way", dim), one_way)
                    bad |= g < 2
                    variance, df = kind.scaled(squares, n, dof, g), kind.inference_df(dof, [g])
            bad |= dof <= 0
            se = np.sqrt(variance)
        beta = fit.beta.copy()
        finite = np.isfinite(beta) & np.isfinite(se)
        estimate, std_error, dfs = np.full(d_count, np.nan), np.full(d_count, np.nan), np.full(d_count, np.nan)
        estimate[live] = np.where(bad | finite, beta, np.nan)
        std_error[live] = np.where(bad | ~finite, np.nan, se)
        dfs[live] = np.where(bad | ~finite, np.nan, df)
        return estimate, std_error, dfs

    def _batch_meat(self, dim: tuple[str, ...], scores: np.ndarray, copies: np.ndarray, counts: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
        """One cluster variable's part of the two-way meat before its factor (draws, k, k), and its numbers
        of clusters."""
        sums, mult, groups = self._batch_cluster_sums(dim, scores, copies, counts)
        weighted = sums * mult.T[:, :, None]  # (clusters, draws, k)
        return np.matmul(weighted.transpose(1, 2, 0), sums.transpose(1, 0, 2)), groups

    def _indicator(self, dim: tuple[str, ...]) -> sp.csr_array:
        """The design's rows' clusters of ``dim`` (pairs, for a variable the copies relabel), as a sparse
        clusters x rows indicator matrix."""
        if dim not in self._cluster_matrices:
            d = self.dims[dim]
            codes = d.pair if d.copied else d.codes
            assert codes is not None
            size = len(d.pair_level) if d.copied and d.pair_level is not None else d.n
            n = len(codes)
            self._cluster_matrices[dim] = sp.csr_array((np.ones(n), (codes, np.arange(n))), shape=(size, n))
        return self._cluster_matrices[dim]

    def _with_shares(self, spec: Spec, fit: _Batch, got: tuple[np.ndarray, np.ndarray, np.ndarray],
                     copies: np.ndarray, counts: np.ndarray, alone: np.ndarray
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """An interaction-weighted estimate's SE with the variance its estimated cohort shares add (as
        :func:`fegrid.staggered.share_covariance` on the stacked rows): a row in cell ``c`` from adoption on
        moves the aggregate by ``(b_c - theta) / M`` (``M`` the draw's observations in those cells), summed by
        cluster (a relabelled cluster once per copy), times ``G/(G-1)``. A draw where either part is not
        finite takes the stacked refit (marked in ``alone``)."""
        estimate, std_error, dfs = got
        live, sh = fit.draws, self.shares[spec.spec_id]
        k = len(sh.post)
        cells_count = (counts[live] @ self.level_cells[spec.spec_id]) * sh.post
        total = cells_count.sum(axis=1)
        spread = sh.post * (fit.memo["coefficients"][:, :k] - fit.beta[:, None]) / total[:, None]
        first = np.vstack([spread.T, np.zeros((1, len(live)))])[np.where(sh.cell_of_row >= 0, sh.cell_of_row, k)]
        sums, mult, g = self._batch_cluster_sums(sh.share_dim, first, copies[:, live], counts[live])
        with np.errstate(divide="ignore", invalid="ignore"):
            added = (sums * sums * mult.T).sum(axis=0) * np.where(g > 1, g / (g - 1), np.nan)
            se = np.sqrt(std_error[live] ** 2 + added)
        doubt = ~(np.isfinite(se) & np.isfinite(estimate[live]))
        alone[live[doubt]] = True
        std_error = std_error.copy()
        std_error[live] = se
        return estimate, std_error, dfs

    def _batch_cluster_sums(self, dim: tuple[str, ...], values: np.ndarray, copies: np.ndarray, counts: np.ndarray
                            ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """:meth:`_cluster_sums` for draws together: ``values`` (rows, draws[, k]) summed per cluster (clusters,
        draws[, k]), each cluster's count per draw (draws, clusters) and the draws' numbers of clusters;
        ``copies`` (rows, draws), ``counts`` (draws, levels)."""
        d = self.dims[dim]
        ind = self._indicator(dim)
        rows = values.shape[0]
        if d.copied:
            assert d.pair_level is not None
            sums = ind @ values.reshape(rows, -1)
            mult = counts[:, d.pair_level]
        else:
            scaled = values * (copies if values.ndim == 2 else copies[:, :, None])
            sums = ind @ scaled.reshape(rows, -1)
            mult = ((ind @ copies) > 0).T.astype(float)
        return sums.reshape(ind.shape[0], *values.shape[1:]), mult, mult.sum(axis=1)

    def _refit_weighted(self, draw: Draw, specs: Sequence[Spec] | None = None
                        ) -> list[tuple[str, float, float, float]] | None:
        """Least squares and 2SLS of ``specs`` (all the design's by default) on the design's rows, each weighted
        by its copies in the draw: the stacked rows' cross products, residuals and cluster sums are those of
        the rows counted by their copies (a cluster that the copies relabel, the unit's or the resampling
        column's, counts once per copy).
        Poisson PML specifications are fitted on the drawn rows (:meth:`_poisson`) and take their inference
        on the stacked rows."""
        copies = draw.counts[self.levels]
        if not copies.any():  # none of the design's rows drawn: the stacked refit decides
            return None
        if self.strict and any(s.spec_id in self.strict for s in (self.specs if specs is None else specs)):
            return None  # an event study the batch could not vouch for (see _event_study_checks)
        m = len(self.columns)
        transform: np.ndarray | None = None
        local_gamma: np.ndarray | None = None  # the columns (partialled) from the rows' stored columns
        if self.reweighted:
            try:
                rows, u = self._demean_on_drawn(draw)
            except _Unsupported:
                return None
            c = copies[rows].astype(float)
            cw = c * self.w[rows]
            gram = (u * cw[:, None]).T @ u
        elif self.local is not None:  # the crossing groups' dummies partialled out part by part
            assert self.cross is not None
            rows, u = None, self.within
            c = copies.astype(float)
            q = m + self.local.k
            weighted = (self.cross * draw.counts[self.level_ids].astype(float)[:, None]).reshape(-1, q, q)
            weighted = (weighted + weighted.transpose(0, 2, 1)) / 2
            zz, dz, local_gamma = self.local.solve(weighted, m)
            gram = zz - dz.T @ local_gamma
        else:
            assert self.u is not None
            rows, u = None, self.u
            c = copies.astype(float)
            cw = c * self.w
            q = u.shape[1]
            if self.cross is not None:
                big = (draw.counts[self.level_ids].astype(float) @ self.cross).reshape(q, q)
            else:
                big = (u * cw[:, None]).T @ u
            big = (big + big.T) / 2
            gram = big[:m, :m]
            if q > m:  # the dummy columns partialled out, from the cross products
                eigval, eigvec = np.linalg.eigh(big[m:, m:])
                ok = eigval > 1e-12 * max(float(eigval.max()), 1e-300)
                gamma = ((eigvec[:, ok] / eigval[ok]) @ eigvec[:, ok].T) @ big[m:, :m]
                gram = gram - big[:m, m:] @ gamma
                transform = np.vstack([np.eye(m), -gamma])
        gram = (gram + gram.T) / 2
        norm = np.sqrt(np.maximum(np.diag(gram), 0.0))
        raw_norm = self._raw_norm(draw)
        if raw_norm is None:
            return None
        weighted = _Weighted(u, transform, rows, c, self.w if rows is None else self.w[rows], draw.counts,
                             self.local, local_gamma)
        absorbed_df: int | None = None
        nested: dict[tuple[tuple[str, ...], ...], int] = {}
        out = []
        fits: dict[tuple[object, ...], tuple[_Coef, np.ndarray] | None] = {}
        poisson: dict[tuple[object, ...], _Fit | None] = {}
        stacked = None
        stacked_nested: dict[tuple[tuple[str, ...], ...], int] = {}
        for spec in self.specs if specs is None else specs:
            est = spec.estimator
            key = (spec.outcome, spec.focal, spec.controls, est.method, est.instruments, est.endogenous)
            if est.method == POISSON:  # fitted on the drawn rows, its inference on the stacked rows
                if stacked is None:
                    stacked = self._stacked(draw)
                rows_s, position, codes, absorber = stacked
                if key not in poisson:
                    poisson[key] = self._poisson(spec, gram, norm, raw_norm, draw, rows_s, position, codes)
                    if poisson[key] is None:
                        return None
                fit = poisson[key]
                assert fit is not None
                by = spec.inference.by
                if fit.absorber is not None:  # a Poisson fit on fewer rows: its own absorber and codes
                    assert fit.codes is not None
                    own = fit.absorber.nested_df([fit.codes[d] for d in by]) if by and self.settings.absorb else 0
                    out.append(self._inference(spec, fit, fit.absorber, own, fit.codes))
                    continue
                if by not in stacked_nested:
                    stacked_nested[by] = (absorber.nested_df([codes[d] for d in by]) if by and self.settings.absorb
                                          else 0)
                out.append(self._inference(spec, fit, absorber, stacked_nested[by], codes))
                continue
            if key not in fits:  # one regression, whatever the covariance choice
                coef = (self._two_stage(spec, gram, norm, raw_norm) if est.method == TWO_STAGE
                        else self._regression(spec, gram, norm, raw_norm))
                if coef is None:
                    return None
                # the residuals and the focal row of B X' on the rows, once for every covariance choice
                fits[key] = (coef, weighted.at(np.column_stack([coef.e, coef.h]))) if coef.idx else None
            got = fits[key]
            if got is None:
                out.append((spec.spec_id, float("nan"), float("nan"), float("nan")))
                continue
            if absorbed_df is None:  # the effects' df on the stacked rows, counted from the copies
                absorbed_df, nested = self.copies_df.count(draw, self.by_sets)
            out.append(self._weighted_inference(spec, *got, weighted, absorbed_df, nested[spec.inference.by]))
        return out

    def _raw_norm(self, draw: Draw) -> np.ndarray | None:
        """The raw columns' weighted spread on the draw (``None`` when one is (nearly) constant: rounding
        decides). Sums over the stacked rows are the base rows' sums weighted by their copies (the columns
        centred on their base means, against cancellation)."""
        copies = draw.counts[self.levels] * self.w
        total = copies.sum()
        first = copies @ self.raw_centred
        raw_norm = np.sqrt(np.maximum(copies @ self.raw_squared - first * first / total, 0.0))
        if np.any(raw_norm <= 1e-6 * np.sqrt(total) * self.raw_scale):
            return None
        return raw_norm

    def _weighted_inference(self, spec: Spec, fit: _Coef, on_rows: np.ndarray, rows: _Weighted, absorbed_df: int,
                            nested_df: int) -> tuple[str, float, float, float]:
        """One covariance choice of a regression on the rows weighted by their copies: the formulas of the
        engine's covariance kinds (:mod:`fegrid.covariance`) on the stacked rows, summed row by row with the
        copies as counts (``N`` the copies' total; a cluster the copies relabel counts once per copy)."""
        nan = float("nan")
        beta = float(fit.beta[0])
        kind = covariance_kind(spec.inference.kind)
        n = float(rows.copies.sum())
        p = len(fit.idx)
        e = on_rows[:, 0]
        try:
            dof = kind.checked_df(n, p, absorbed_df, nested_df)  # type: ignore[arg-type]
            if isinstance(kind, Iid):
                variance, df = kind.scaled(float(rows.copies @ (rows.w * e * e)), n, dof) * float(fit.bread[0, 0]), dof
            elif isinstance(kind, TwoWay):
                scores = rows.at(fit.x) * (rows.w * e)[:, None]
                by = spec.inference.by
                meat = np.zeros((p, p))
                counts = []
                for dim, sign in zip((by[0], by[1], by[0] + by[1]), TWO_WAY_SIGNS):
                    sums, mult, g = self._cluster_sums(dim, scores, rows)
                    if g < 2:
                        raise EstimationError("a cluster variable has a single group in this sample")
                    meat += sign * kind.scaled(sums.T @ (sums * mult[:, None]), n, dof, g)
                    counts.append(g)
                v = fit.bread @ meat @ fit.bread
                v = clip_negative((v + v.T) / 2)[0]
                variance, df = float(v[0, 0]), kind.inference_df(dof, counts)
            else:
                he = rows.w * on_rows[:, 1] * e
                if isinstance(kind, Robust):
                    variance, df = kind.scaled(float(rows.copies @ (he * he)), n, dof), dof
                else:
                    assert isinstance(kind, OneWay)
                    sums, mult, g = self._cluster_sums(spec.inference.by[0], he, rows)
                    if g < 2:
                        raise EstimationError("the cluster variable has a single group in this sample")
                    variance, df = kind.scaled(float(mult @ (sums * sums)), n, dof, g), kind.inference_df(dof, [g])
        except EstimationError:
            return spec.spec_id, beta, nan, nan
        se = float(np.sqrt(variance))
        if not (np.isfinite(beta) and np.isfinite(se)):
            return spec.spec_id, nan, nan, nan
        return spec.spec_id, beta, se, float(df)

    def _cluster_sums(self, dim: tuple[str, ...], values: np.ndarray, rows: _Weighted
                      ) -> tuple[np.ndarray, np.ndarray, int]:
        """Sums of ``values`` (rows, or rows x k) over the clusters of ``dim`` on the weighted rows, each
        cluster's count on the stacked rows, and the stacked rows' number of clusters."""
        d = self.dims[dim]
        if d.copied:  # each copy of a level holds its own cluster, whose sum is the rows' own
            assert d.pair is not None and d.pair_level is not None
            codes, size = rows.on(d.pair), len(d.pair_level)
            mult = rows.counts[d.pair_level].astype(float)
            weights = None
        else:  # one cluster for all the copies: each row counted by its copies
            codes, size = rows.on(d.codes), d.n
            mult = None
            weights = rows.copies
        if values.ndim == 1:
            sums = np.bincount(codes, values if weights is None else values * weights, minlength=size)
        else:
            scaled = values if weights is None else values * weights[:, None]
            sums = np.column_stack([np.bincount(codes, scaled[:, j], minlength=size) for j in range(values.shape[1])])
        if mult is None:
            mult = (np.bincount(codes, rows.copies, minlength=size) > 0).astype(float)
        return sums, mult, int(mult.sum())

    def _stacked(self, draw: Draw) -> tuple[np.ndarray, np.ndarray, dict[tuple[str, ...], np.ndarray], Absorber]:
        """The draw's stacked rows (positions in the design's rows), their copies, the codes of the absorbed
        terms and cluster variables on them and their absorber: Poisson PML's inference runs on them."""
        b = self.base_index[draw.rows]
        on = b >= 0
        rows, position = b[on], draw.position[on]
        codes = {g: dim.stacked(rows, position, draw.picks) for g, dim in self.dims.items()}
        absorber = Absorber(len(rows), self.settings.absorb, weights=self.w[rows] if self.settings.weights else None,
                            time=self.settings.time if self.time is not None else None,
                            time_values=self.time[rows] if self.time is not None else None,
                            codes_of=lambda g: codes[g])
        return rows, position, codes, absorber

    def _demean_on_drawn(self, draw: Draw) -> tuple[np.ndarray, np.ndarray]:
        """The drawn rows of the design and its columns demeaned on them, each row weighted by its copies
        (and its weight)."""
        drawn = np.flatnonzero(draw.counts[self.levels] > 0)
        copies = draw.counts[self.levels[drawn]].astype(float)
        codes = {g: _dense(c[drawn], int(c.max()) + 1) for g, c in self.term_codes.items()}
        absorber = Absorber(len(drawn), self.settings.absorb, weights=copies * self.w[drawn],
                            time=self.settings.time if self.time is not None else None,
                            time_values=self.time[drawn] if self.time is not None else None,
                            tolerance=self.settings.tolerance, max_iterations=self.settings.max_iterations,
                            codes_of=lambda g: codes[g])
        out = absorber.demean(self.raw[drawn])
        if not out.converged.all():
            raise _Unsupported("not converged")
        return drawn, out.values

    def _absorbed(self, j: int, norm: np.ndarray, raw_norm: np.ndarray) -> bool | None:
        ratio = norm[j] / raw_norm[j]
        if self.ident_tol / MARGIN < ratio < self.ident_tol * MARGIN:
            return None
        return bool(ratio <= self.ident_tol)

    def _collinear(self, j: int, kept: list[int], gram: np.ndarray, norm: np.ndarray) -> bool | None:
        if not kept:
            return False
        gk = gram[np.ix_(kept, kept)]
        r2 = gram[j, j] - gram[j, kept] @ np.linalg.solve(gk, gram[kept, j])
        ratio = np.sqrt(max(r2, 0.0)) / norm[j]
        return None if ratio < 1e-4 else False  # the engine's threshold is 1e-7: only clear cases here

    def _kept_controls(self, controls: Sequence[str], norm: np.ndarray, raw_norm: np.ndarray,
                       gram: np.ndarray, base: Sequence[int] = ()) -> list[int] | None:
        """The columns a regression keeps of ``controls`` (absorbed ones dropped, and those collinear
        with ``base`` and the ones kept before them), in order; ``None`` when a decision is near its
        threshold."""
        kept: list[int] = []
        for c in controls:
            j = self.pos[c]
            absorbed = self._absorbed(j, norm, raw_norm)
            if absorbed is None:
                return None
            if absorbed:
                continue
            if self._collinear(j, [*base, *kept], gram, norm) is None:
                return None
            kept.append(j)
        return kept

    def _focal_identified(self, j: int, kept: list[int], norm: np.ndarray, raw_norm: np.ndarray,
                          gram: np.ndarray) -> bool | None:
        absorbed = self._absorbed(j, norm, raw_norm)
        if absorbed is None or (not absorbed and self._collinear(j, kept, gram, norm) is None):
            return None
        return not absorbed

    def _regressors(self, spec: Spec, norm: np.ndarray, raw_norm: np.ndarray, gram: np.ndarray) -> list[int] | None:
        """The columns a regression keeps on the draw, focal first (empty when the focal regressor is not
        identified in this draw); ``None`` when a decision is near its threshold."""
        kept = self._kept_controls(spec.controls, norm, raw_norm, gram)
        if kept is None:
            return None
        j = self.pos[spec.focal]
        identified = self._focal_identified(j, kept, norm, raw_norm, gram)
        if identified is None:
            return None
        return [j, *kept] if identified else []

    def _coef(self, idx: list[int], bread: np.ndarray, beta: np.ndarray, y: int, x: np.ndarray) -> _Coef:
        """A regression of column ``y`` on the columns ``idx`` whose scores' regressors are ``z @ x``."""
        e = np.zeros(len(self.columns))
        e[y] = 1.0
        e[idx] -= beta
        return _Coef(idx, bread, beta, e, x @ bread[:, 0], x)

    def _regression(self, spec: Spec, gram: np.ndarray, norm: np.ndarray, raw_norm: np.ndarray) -> _Coef | None:
        """Least squares on the draw (not identified: the focal regressor is absorbed in this draw);
        ``None`` when a decision is near its threshold."""
        idx = self._regressors(spec, norm, raw_norm, gram)
        if not idx:
            return None if idx is None else _NOT_IDENTIFIED_COEF
        y = self.pos[spec.outcome]
        bread = np.linalg.inv(gram[np.ix_(idx, idx)])
        beta = bread @ gram[idx, y]
        x = np.zeros((len(self.columns), len(idx)))
        x[idx, np.arange(len(idx))] = 1.0
        return self._coef(idx, bread, beta, y, x)

    def _two_stage(self, spec: Spec, gram: np.ndarray, norm: np.ndarray, raw_norm: np.ndarray) -> _Coef | None:
        """Two-stage least squares on the draw, with the engine's identification rules
        (:meth:`fegrid.estimate._Design.iv_regressors`); ``None`` when a decision is near its threshold."""
        est = spec.estimator
        exog_names = [c for c in spec.controls if c not in est.endogenous]
        exog = self._kept_controls(exog_names, norm, raw_norm, gram)
        if exog is None:
            return None
        identified = self._focal_identified(self.pos[spec.focal], exog, norm, raw_norm, gram)
        if identified is None:
            return None
        endog = [self.pos[spec.focal]]
        for name in est.endogenous:
            absorbed = self._absorbed(self.pos[name], norm, raw_norm)
            if absorbed is None:
                return None
            identified = identified and not absorbed
            endog.append(self.pos[name])
        kept_names = {self.columns[j] for j in exog}  # an instrument also a control is dropped, whatever the draw
        excluded = self._kept_controls([n for n in est.instruments if n not in kept_names], norm, raw_norm, gram,
                                       base=exog)
        if excluded is None:
            return None
        if not identified or len(excluded) < len(endog):
            return _NOT_IDENTIFIED_COEF
        ix, iw = endog + exog, excluded + exog
        pi = np.linalg.solve(gram[np.ix_(iw, iw)], gram[np.ix_(iw, ix)])  # X on the instruments
        a = gram[np.ix_(ix, iw)] @ pi
        if first_stage_rank(a) <= FIRST_STAGE_RANK_TOL * MARGIN:  # (nearly) rank-deficient first stage
            return None
        bread = np.linalg.inv(a)
        y = self.pos[spec.outcome]
        beta = bread @ (pi.T @ gram[iw, y])
        fitted = np.zeros((len(self.columns), len(ix)))
        fitted[iw] = pi
        return self._coef(ix, bread, beta, y, fitted)

    def _poisson(self, spec: Spec, gram: np.ndarray, norm: np.ndarray, raw_norm: np.ndarray,
                 draw: Draw, rows: np.ndarray, position: np.ndarray, codes: dict[tuple[str, ...], np.ndarray]
                 ) -> _Fit | None:
        """Poisson PML on the draw (its null imposed), fitted on the drawn rows weighted by their copies:
        the stacked copies of a row have the same outcome, regressors and effects, so their score
        equations are the row's times its copies. The engine's rules are followed in the same order
        (:func:`fegrid.estimate._fit_poisson`): the regressors' identification on the design's rows,
        effect groups whose outcome is zero throughout, separated observations, regressors the dropped
        rows leave constant within the effects. ``None`` (the stacked refit) when a decision is near its
        threshold, when dropped rows leave a singleton among the copies, when the cheap certificate of
        no separation (:func:`fegrid.poisson.positives_span_everything`) does not hold on the drawn rows
        (without it the engine runs the rectifier), or when the fit does not converge. A separating
        combination on the copies, averaged over each row's copies, would separate the drawn rows: so
        the certificate on the drawn rows rules separation out on the copies too."""
        idx = self._regressors(spec, norm, raw_norm, gram)
        if not idx:
            return None if idx is None else _NOT_IDENTIFIED
        s = self.settings
        copies = draw.counts[self.levels]
        drawn = np.flatnonzero(copies > 0)
        y = self.null[spec.spec_id][drawn]
        if not np.all(np.isfinite(y)) or bool((y < 0).any()):
            return None
        term_codes = self.term_codes.__getitem__
        zero = zero_group_rows(y, s.absorb, codes_on_rows(term_codes, drawn)) if s.absorb else np.zeros(len(y), bool)
        keep = drawn[~zero]
        y = y[~zero]
        if not (y > 0).any() or (zero.any() and not s.keep_singletons and self._copies_leave_singletons(copies, keep)):
            return None
        c = copies[keep].astype(float)
        w_user = self.w[keep]
        on_keep = codes_on_rows(term_codes, keep)
        time = s.time if self.time is not None else None
        time_values = self.time[keep] if self.time is not None else None
        x = np.asfortranarray(self.raw[np.ix_(keep, idx)])
        zeros = y == 0
        if zeros.any() and not positives_span_everything(zeros, x, s.absorb, time=time, time_values=time_values,
                                                         tolerance=s.tolerance, max_iterations=s.max_iterations,
                                                         codes_of=on_keep):
            return None
        # regressors that the dropped rows leave constant within the effects are dropped (norms over the copies)
        on_copies = Absorber(len(keep), s.absorb, weights=c * w_user, time=time, time_values=time_values,
                             tolerance=s.tolerance, max_iterations=s.max_iterations, codes_of=on_keep,
                             direct_at_once=True)  # its layout serves every step of the fit below
        check = on_copies.demean(x).values
        spread = x - (c @ x) / c.sum()
        ratio = np.sqrt(c @ (check * check)) / np.maximum(np.sqrt(c @ (spread * spread)), 1e-300)
        if np.any((ratio > self.ident_tol / MARGIN) & (ratio < self.ident_tol * MARGIN)):
            return None
        flat = ratio <= self.ident_tol
        if flat[0]:
            return _NOT_IDENTIFIED
        start = self.start[spec.spec_id]
        if start is not None:
            start = _effects_updated(start[keep], y, c * w_user, [on_keep(t.groups) for t in s.absorb
                                                                  if not t.has_slope], START_ROUNDS)
        fit = irls(len(keep), y, x[:, ~flat], s.absorb, weights=c * w_user, time=time, time_values=time_values,
                   tolerance=s.tolerance, max_iterations=s.max_iterations, codes_of=on_keep, start=start,
                   absorber=on_copies)
        if not fit.converged:
            return None
        xs = fit.demeaned * np.sqrt(w_user * fit.mu)[:, None]
        e = (y - fit.mu) * np.sqrt(w_user) / np.sqrt(fit.mu)
        try:
            bread = np.linalg.inv(xs.T @ (xs * c[:, None]))
        except np.linalg.LinAlgError:
            return None
        # on the stacked rows: each copy of a kept row
        where = np.full(len(self.levels), -1, dtype=np.int64)
        where[keep] = np.arange(len(keep))
        k = where[rows]
        on = k >= 0
        xs_s = np.asfortranarray(xs[k[on]])
        cols = [i for i, f in zip(idx, flat) if not f]
        if on.all():
            return _Fit(cols, bread, fit.coefficients, e[k], xs_s @ bread[:, 0], xs_s)
        kept_codes = {g: _dense(c_[on], int(c_.max()) + 1) for g, c_ in codes.items()}
        absorber = Absorber(int(on.sum()), s.absorb, weights=self.w[rows[on]] if s.weights else None, time=time,
                            time_values=self.time[rows[on]] if self.time is not None else None,
                            codes_of=kept_codes.__getitem__)
        return _Fit(cols, bread, fit.coefficients, e[k[on]], xs_s @ bread[:, 0], xs_s, absorber, kept_codes)

    def _poisson_start(self, spec: Spec) -> np.ndarray | None:
        """The linear predictor of the specification's Poisson PML under its null on the design's rows outside
        zero groups (all its regressors), where the draws' iterations start (a draw's kept rows are among
        them: a zero group stays one in every draw); ``None`` (the draws start from their outcome) when
        the fit does not converge or nearly separates rows."""
        s = self.settings
        y = self.null[spec.spec_id]
        if not np.all(np.isfinite(y)) or bool((y < 0).any()) or not (y > 0).any():
            return None
        keep = np.flatnonzero(~zero_group_rows(y, s.absorb, self.term_codes.__getitem__)) if s.absorb else \
            np.arange(len(y))
        x = self.raw[np.ix_(keep, [self.pos[c] for c in (spec.focal, *spec.controls)])]
        try:
            fit = irls(len(keep), y[keep], x, s.absorb, weights=self.w[keep],
                       time=s.time if self.time is not None else None,
                       time_values=None if self.time is None else self.time[keep], tolerance=s.tolerance,
                       max_iterations=s.max_iterations, codes_of=codes_on_rows(self.term_codes.__getitem__, keep))
        except (np.linalg.LinAlgError, FegridError):
            return None
        if (not fit.converged or not np.all(np.isfinite(fit.mu))
                or fit.mu.min() <= 1e-8 * np.average(y[keep], weights=self.w[keep])):
            return None
        eta = np.full(len(y), np.nan)
        eta[keep] = np.log(fit.mu)
        return eta

    def _copies_leave_singletons(self, copies: np.ndarray, keep: np.ndarray) -> bool:
        """Whether the copies of the design's rows ``keep`` hold an effect level with one row (a copied
        term's level has its row's count in each copy; a shared term's, the sum over the copies)."""
        for term in self.settings.absorb:
            codes = self.term_codes[term.groups][keep]
            counts = np.bincount(codes, None if self.dims[term.groups].copied else copies[keep])
            if np.any(counts == 1):
                return True
        return False

    def _inference(self, spec: Spec, fit: _Fit, absorber: Absorber, nested_df: int,
                   codes: dict[tuple[str, ...], np.ndarray]) -> tuple[str, float, float, float]:
        """One covariance choice of a regression, by the engine's covariance kind."""
        nan = float("nan")
        if not fit.idx:
            return spec.spec_id, nan, nan, nan  # not identified in this draw
        e, regressors = fit.e, fit.regressors
        pieces = FitPieces(estimate=float(fit.beta[0]), e=e, h=fit.h, rss=float(e @ e), bread=fit.bread,
                           within_r2=nan, scores=lambda: np.asfortranarray(regressors * e[:, None]),
                           coefficients=fit.beta)
        by = spec.inference.by
        clusters = _covariance_codes(spec.request(), [codes[d] for d in by], lambda d: codes[d])
        try:
            cov = covariance_kind(spec.inference.kind)(pieces, n_params=len(fit.idx), absorbed_df=absorber.absorbed_df,
                                                       nested_df=nested_df, clusters=clusters)
        except EstimationError:
            return spec.spec_id, float(fit.beta[0]), nan, nan
        se = float(np.sqrt(cov.variance))
        if not (np.isfinite(fit.beta[0]) and np.isfinite(se)):
            return spec.spec_id, nan, nan, nan
        return spec.spec_id, float(fit.beta[0]), se, float(cov.df)


class _GroupTimeDraws(_DesignRows):
    """One complete-case group of a block's group-time specifications (Callaway & Sant'Anna 2021, overall
    estimate, as :func:`fegrid.staggered.group_time` computes it for a draw), refitted from the design's units
    counted by their copies.

    Every quantity of the estimator is a mean over the balanced panel's units: on a draw's stacked rows, a
    unit drawn ``c`` times counts ``c`` times (cohort shares, treated and control means, the covariates' fit
    among the controls), and each copy has the same influence on the estimate. Its variance sums that
    influence by cluster: a cluster that the copies relabel (the unit's, the resampling column's) once per
    copy of its level, with the copies' count of clusters; a shared cluster over its units' copies, counted
    once if drawn at all. A draw without some period of the design's rows (the periods are positions among
    them), without an adopting unit or cohort, with a covariates' fit near rank deficiency, or whose
    estimate or SE is not finite, takes the stacked refit (which decides and says why)."""

    def __init__(self, frame: pd.DataFrame, positions: np.ndarray, cc: np.ndarray, specs: list[Spec],
                 settings: BlockSettings, levels: np.ndarray, n_levels: int, copied: set[str], column: str) -> None:
        super().__init__(frame, positions, cc, settings, levels, n_levels, copied)
        rows, self.specs = self.rows, specs
        design = rows_cohorts(rows, settings)
        unit, period = design.unit, design.period.astype(np.int64)
        self.n_periods = n_periods = int(period.max()) + 1
        if np.unique(unit * n_periods + period).size != len(rows):
            raise _Unsupported("a unit observed twice in a period")
        n_units = int(unit.max()) + 1
        unit_level = np.full(n_units, -1, dtype=np.int64)
        unit_level[unit] = self.levels
        if not np.array_equal(unit_level[unit], self.levels):
            raise _Unsupported("a unit in several resampling levels")
        first_row = np.full(n_units, len(unit))
        np.minimum.at(first_row, unit, np.arange(len(unit)))
        start = design.cohort[first_row]
        self._note_adoption(design)
        full = np.bincount(unit, minlength=n_units) == n_periods
        if not full.any():
            raise _Unsupported("no unit observed in every period")
        self.full = np.flatnonzero(full)  # the balanced panel's units (the engine renumbers them in this order)
        self.unit_level = unit_level[self.full]
        group = np.where(np.isfinite(start), start, np.inf)[self.full]
        self.group = group
        self.cohorts = [int(g) for g in np.unique(group[np.isfinite(group)]) if 0 < g < n_periods]
        if not self.cohorts:
            raise _Unsupported("no cohort adopts inside the periods among the balanced units")
        self.member = np.column_stack([group == g for g in self.cohorts]).astype(float)
        on_full = full[unit]
        where = np.full(n_units, -1, dtype=np.int64)
        where[self.full] = np.arange(len(self.full))
        self._unit_rows = (where[unit[on_full]], period[on_full], np.flatnonzero(on_full))
        # each covariance choice's clusters, per balanced unit: relabelled per copy, or shared by the copies
        self.clusters: dict[tuple[str, ...], tuple[np.ndarray, bool]] = {}
        for spec in specs:
            dim = staggered_cluster_dim(spec.inference, settings.unit)
            if dim in self.clusters:
                continue
            codes = pd.factorize(rows[dim[0]])[0] if dim[0] in rows else None
            if codes is None or (codes < 0).any():
                raise _Unsupported("a cluster column the design lacks")
            per_unit = np.full(len(self.full), -1, dtype=np.int64)
            u_rows, _, r = self._unit_rows
            per_unit[u_rows] = codes[r]
            if not np.array_equal(per_unit[u_rows], codes[r]):
                raise _Unsupported("clusters that vary within a unit")  # the engine refuses them: stacked
            self.clusters[dim] = (pd.factorize(per_unit)[0], dim[0] in (settings.unit, column))
        self._tables: dict[tuple[str, tuple[str, ...]], tuple[np.ndarray, np.ndarray | None]] = {}

    def _table(self, outcome: str, controls: tuple[str, ...]) -> tuple[np.ndarray, np.ndarray | None]:
        """The balanced units' outcome by period (units, periods), and their covariates (units, periods, k)."""
        key = (outcome, controls)
        if key not in self._tables:
            u, t, r = self._unit_rows
            ymat = np.full((len(self.full), self.n_periods), np.nan)
            ymat[u, t] = self.rows[outcome].to_numpy(dtype=float)[r]
            xmat = None
            if controls:
                xmat = np.full((len(self.full), self.n_periods, len(controls)), np.nan)
                xmat[u, t] = self.rows[list(controls)].to_numpy(dtype=float)[r]
            self._tables[key] = (ymat, xmat)
        return self._tables[key]

    def _key(self, spec: Spec) -> tuple[str, tuple[str, ...], str, tuple[str, ...]]:
        """What a specification's result depends on here: outcome, covariates, control group, clusters."""
        options = spec.estimator.staggered
        assert options is not None
        return (spec.outcome, spec.controls, options.control, staggered_cluster_dim(spec.inference, self.settings.unit))

    def refit(self, draw: Draw) -> list[tuple[str, float, float, float]] | None:
        return self.refit_many([draw])[0]

    def refit_many(self, draws: Sequence[Draw]) -> list[list[tuple[str, float, float, float]] | None]:
        """``(spec_id, estimate, std_error, df)`` per specification and draw, or ``None``: the stacked refit."""
        if not draws:
            return []
        counts = np.stack([d.counts for d in draws]).astype(float)
        ok = (counts[:, self.levels].sum(axis=1) > 0) & self._holds_adoption(counts)
        ok &= np.array([bool(ok[i]) and self._singletons_agree(d) for i, d in enumerate(draws)])
        c = counts[:, self.unit_level]  # (draws, balanced units): each unit's copies
        n = c.sum(axis=1)
        ok &= (n > 0) & ((c @ self.member) > 0).any(axis=1)
        live = np.flatnonzero(ok)
        got: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
        size = max(1, BATCH_CELLS // max(1, len(self.full) * len(self.cohorts) * self.n_periods))
        for spec in self.specs:
            key = self._key(spec)
            if key not in got:
                out = np.full((3, len(draws)), np.nan)
                for start in range(0, len(live), size):
                    part = live[start: start + size]
                    out[:, part] = self._overall(spec, key[2], key[3], c[part], n[part], counts[part])
                got[key] = (out[0], out[1], out[2])
        results: list[list[tuple[str, float, float, float]] | None] = []
        for i in range(len(draws)):
            rows = []
            for spec in self.specs:
                est, se, df = got[self._key(spec)]
                if not (ok[i] and np.isfinite(est[i]) and np.isfinite(se[i])):
                    rows = None
                    break
                rows.append((spec.spec_id, float(est[i]), float(se[i]), float(df[i])))
            results.append(rows)
        return results

    def _overall(self, spec: Spec, control: str, dim: tuple[str, ...], c: np.ndarray, n: np.ndarray,
                 counts: np.ndarray) -> np.ndarray:
        """Estimates, SEs and df of the overall group-time effect for draws with units' copies ``c``
        (draws, units); NaN for a draw that the stacked refit must decide."""
        ymat, xmat = self._table(spec.outcome, spec.controls)
        group, member = self.group, self.member
        d_count = len(n)
        pg = (c @ member) / n[:, None]  # the cohorts' shares of the units
        cells = [(gi, g, t) for gi, g in enumerate(self.cohorts) for t in range(g, self.n_periods)]
        att = np.zeros((d_count, len(cells)))
        psi = np.zeros((d_count, len(group), len(cells)))
        sel = np.zeros((d_count, len(cells)))
        doubt = np.zeros(d_count, dtype=bool)
        for k, (gi, g, t) in enumerate(cells):
            mine = member[:, gi]
            ctrl = (~np.isfinite(group) if control == "never_treated" else (group > max(t, g - 1)) & (mine == 0))
            ctrl = ctrl.astype(float)
            dy = ymat[:, t] - ymat[:, g - 1]
            s1, s0 = c @ mine, c @ ctrl
            fine = (s1 > 0) & (s0 > 0)
            if not fine.any():
                continue
            s1, s0 = np.where(fine, s1, 1.0), np.where(fine, s0, 1.0)
            if xmat is None:
                mu1, mu0 = (c @ (mine * dy)) / s1, (c @ (ctrl * dy)) / s0
                a = mu1 - mu0
                ps = (mine * (dy - mu1[:, None]) / (s1 / n)[:, None]
                      - ctrl * (dy - mu0[:, None]) / (s0 / n)[:, None]) / n[:, None]
            else:
                x = np.column_stack([np.ones(len(group)), xmat[:, g - 1, :]])
                cw = c * ctrl
                gram = np.einsum("du,ui,uj->dij", cw, x, x)
                gram[~fine] = np.eye(x.shape[1])
                sv = np.linalg.svd(gram, compute_uv=False)
                doubt |= fine & ~(sv[:, -1] > 1e-9 * sv[:, 0])  # near the engine's rank rule: the stacked refit
                gram[doubt] = np.eye(x.shape[1])
                b = np.linalg.solve(gram, ((cw * dy) @ x)[:, :, None])[:, :, 0]
                resid = dy[None, :] - b @ x.T
                a = (c * mine * resid).sum(axis=1) / s1
                lever = np.linalg.solve(gram, (((c * mine) @ x) / s1[:, None])[:, :, None])[:, :, 0]
                ps = mine * (resid - a[:, None]) / s1[:, None] - ctrl * (lever @ x.T) * resid
            att[:, k] = np.where(fine, a, 0.0)
            psi[:, :, k] = np.where(fine[:, None], ps, 0.0)
            sel[:, k] = fine
        coh = np.array([gi for gi, _, _ in cells])
        raw = sel * pg[:, coh]
        total = raw.sum(axis=1)
        doubt |= ~(total > 0)
        total = np.where(total > 0, total, 1.0)
        estimate = (raw * att).sum(axis=1) / total
        # the cohort shares' influence, and the overall estimate's (as group_time's aggregate)
        share = ((member[None, :, :] - pg[:, None, :]) / n[:, None, None])[:, :, coh] * sel[:, None, :]
        influence = (np.einsum("duc,dc->du", psi, raw / total[:, None])
                     + np.einsum("duc,dc->du", share, att) / total[:, None]
                     - share.sum(axis=2) * ((raw * att).sum(axis=1) / total**2)[:, None])
        codes, relabelled = self.clusters[dim]
        n_clusters = int(codes.max()) + 1
        if relabelled:  # each copy of a level holds its clusters once: sums over the units, counted per copy
            sums = np.stack([np.bincount(codes, row, minlength=n_clusters) for row in influence])
            level = np.zeros(n_clusters, dtype=np.int64)
            level[codes] = self.unit_level
            copies = counts[:, level]
            squares, n_cl = (sums * sums * copies).sum(axis=1), copies.sum(axis=1)
        else:  # a shared cluster: over its units' copies, one cluster whatever the copies
            sums = np.stack([np.bincount(codes, row, minlength=n_clusters) for row in c * influence])
            held = np.stack([np.bincount(codes, row, minlength=n_clusters) for row in c]) > 0
            squares, n_cl = (sums * sums).sum(axis=1), held.sum(axis=1).astype(float)
        with np.errstate(divide="ignore", invalid="ignore"):
            factor = np.where(n_cl > 1, n_cl / (n_cl - 1), np.nan)
            se = np.sqrt(squares * factor)
        estimate[doubt] = np.nan
        return np.vstack([estimate, se, n_cl - 1])


class _ImputationDraws(_DesignRows):
    """One complete-case group of a block's imputation specifications (Borusyak, Jaravel & Spiess 2024), computed
    on each draw by the engine's own :func:`fegrid.staggered.imputation_pieces` from the design's arrays taken at
    the copies' rows, without a stacked table: each copy's unit (and resampling-column) levels are its own, the
    other effects' and clusters' levels shared, and the cohorts are the rows' own (the same positions when the
    draw holds every period of the design's rows). The same numbers as the stacked refit, in another row order;
    a draw without some period or adopting unit, or whose estimate the engine refuses, takes the stacked refit."""

    def __init__(self, frame: pd.DataFrame, positions: np.ndarray, cc: np.ndarray, specs: list[Spec],
                 settings: BlockSettings, levels: np.ndarray, n_levels: int, copied: set[str], column: str) -> None:
        super().__init__(frame, positions, cc, settings, levels, n_levels, copied)
        rows, self.specs = self.rows, specs
        self.cohorts = rows_cohorts(rows, settings)
        self._note_adoption(self.cohorts)
        level_codes = LevelCodes(rows)
        relabel = {settings.unit, column}

        def coded(columns: tuple[str, ...]) -> tuple[np.ndarray, int, bool]:
            codes = np.asarray(level_codes(columns), dtype=np.int64)
            return codes, int(codes.max()) + 1, bool(relabel.intersection(columns))

        self.terms = [coded(t.groups) for t in settings.absorb]
        self.clusters = {dim: coded(dim) for dim in {staggered_cluster_dim(s.inference, settings.unit) for s in specs}}

    def refit(self, draw: Draw) -> list[tuple[str, float, float, float]] | None:
        """``(spec_id, estimate, std_error, df)`` per specification, or ``None``: the stacked refit."""
        counts = draw.counts.astype(float)
        if not (counts[self.levels].any() and self._holds_adoption(counts[None, :])[0]
                and self._singletons_agree(draw)):
            return None
        on = self.base_index[draw.rows]
        held = on >= 0
        idx, position = on[held], draw.position[held].astype(np.int64)

        def taken(code: tuple[np.ndarray, int, bool]) -> np.ndarray:
            values, n, relabelled = code
            return position * n + values[idx] if relabelled else values[idx]

        c = self.cohorts
        design = Cohorts(c.unit[idx], c.period[idx], c.cohort[idx], c.labels, c.treated[idx])
        codes = [taken(t) for t in self.terms]
        out: list[tuple[str, float, float, float]] = []
        pieces: dict[tuple[object, ...], Any] = {}
        for spec in self.specs:
            options = spec.estimator.staggered
            assert options is not None
            key = (spec.outcome, spec.controls, options)
            try:
                if key not in pieces:
                    y = self.rows[spec.outcome].to_numpy(dtype=float)[idx]
                    x = (self.rows[list(spec.controls)].to_numpy(dtype=float)[idx] if spec.controls
                         else np.zeros((len(idx), 0)))
                    pieces[key] = imputation_pieces(y, design, codes, x, options, pretrend=False, per_period=False)
                dim = staggered_cluster_dim(spec.inference, self.settings.unit)
                got = pieces[key].with_clusters(taken(self.clusters[dim]))
            except ValueError:
                return None
            estimate, se = float(got.estimates[0]), float(np.sqrt(got.covariance[0, 0]))
            if not (np.isfinite(estimate) and np.isfinite(se)):
                return None
            out.append((spec.spec_id, estimate, se, got.df))
        return out

    def refit_many(self, draws: Sequence[Draw]) -> list[list[tuple[str, float, float, float]] | None]:
        return [self.refit(d) for d in draws]


class ReweightedBlock:
    """The least-squares, 2SLS and Poisson PML specifications of one block (sample, absorbed effects,
    weights), prepared once per chunk of draws; :meth:`refit` gives a draw's rows, or ``None`` for the
    stacked refit."""

    def __init__(self, grid: Grid, frame: pd.DataFrame, specs: list[Spec], levels: np.ndarray, n_levels: int,
                 column: str, observed: Mapping[str, float]) -> None:
        self.specs = specs
        settings = grid.block_settings(specs[0])
        positions = sample_rows(frame, specs[0].sample, grid.panel)
        self.levels_in_sample = np.unique(levels[positions])
        self.imposed = {s.spec_id for s in specs if s.estimator.method == POISSON}  # rows fitted under a null
        part = frame.iloc[positions]
        groups: dict[bytes, tuple[np.ndarray, list[Spec]]] = {}
        notna: dict[str, np.ndarray] = {}
        for spec in specs:
            mask = np.ones(len(part), dtype=bool)
            for col in _needed(spec.request(), settings):
                if col not in notna:
                    notna[col] = part[col].notna().to_numpy()
                mask &= notna[col]
            groups.setdefault(np.packbits(mask).tobytes(), (mask, []))[1].append(spec)
        copied = {grid.panel.unit, column}
        if not all(mask.any() for mask, _ in groups.values()):
            raise _Unsupported("a design without rows")
        self.designs: list[_Design | _GroupTimeDraws | _ImputationDraws] = []
        self.left: list[Spec] = []  # specifications a design leaves to the stacked refit
        for mask, members in groups.values():
            group_time = [s for s in members if s.estimator.method == GROUP_TIME]
            imputed = [s for s in members if s.estimator.method == IMPUTATION]
            # the event studies' and cells' regressions in a design of their own: their many indicator columns
            # would otherwise enter every other regression's cross products
            indicators = [s for s in members if s.estimator.method in (EVENT_STUDY, INTERACTION_WEIGHTED)]
            others = [s for s in members
                      if s.estimator.method not in (GROUP_TIME, EVENT_STUDY, INTERACTION_WEIGHTED, IMPUTATION)]
            for rest in (others, indicators):
                while rest:
                    try:
                        self.designs.append(_Design(frame, positions, mask, rest, settings, levels, n_levels, copied,
                                                    observed))
                        break
                    except _LeaveStacked as exc:  # those specifications take the stacked refit; the others stay
                        self.left.extend(s for s in rest if s.spec_id in exc.ids)
                        rest = [s for s in rest if s.spec_id not in exc.ids]
            if group_time:
                self.designs.append(_GroupTimeDraws(frame, positions, mask, group_time, settings, levels, n_levels,
                                                    copied, column))
            if imputed:
                self.designs.append(_ImputationDraws(frame, positions, mask, imputed, settings, levels, n_levels,
                                                     copied, column))
        if self.left:
            gone = {s.spec_id for s in self.left}
            self.specs = [s for s in specs if s.spec_id not in gone]

    def refit(self, draw: Draw) -> list[dict[str, Any]] | None:
        if not draw.counts[self.levels_in_sample].any():
            return None  # the draw holds none of the sample's rows
        rows: list[dict[str, Any]] = []
        for design in self.designs:
            got = design.refit(draw)
            if got is None:
                return None
            rows.extend({"spec_id": s, "estimate": b, "std_error": se, "df_inference": df, "imposed": s in self.imposed}
                        for s, b, se, df in got)
        return rows


    def refit_many(self, draws: Sequence[Draw]) -> list[list[dict[str, Any]] | None]:
        """:meth:`refit` of each draw, each design refitting the draws together (:meth:`_Design.refit_many`)."""
        got: list[list[dict[str, Any]] | None] = [
            [] if d.counts[self.levels_in_sample].any() else None for d in draws]
        for design in self.designs:
            chosen = [i for i, g in enumerate(got) if g is not None]
            for i, rows in zip(chosen, design.refit_many([draws[i] for i in chosen])):
                if rows is None:
                    got[i] = None
                    continue
                out = got[i]
                assert out is not None
                out.extend({"spec_id": s, "estimate": b, "std_error": se, "df_inference": df,
                            "imposed": s in self.imposed} for s, b, se, df in rows)
        return got

def prepare_blocks(grid: Grid, frame: pd.DataFrame, specs: Sequence[Spec], levels: np.ndarray, n_levels: int,
                   column: str, observed: Mapping[str, float] | None = None
                   ) -> tuple[list[ReweightedBlock], list[Spec]]:
    """The blocks that draws can refit by reweighting, and the specifications that take the stacked path;
    ``observed`` holds the Poisson PML specifications' observed estimates (their nulls are imposed)."""
    observed = observed or {}
    fast, rest = fast_specs(specs, observed)
    by_block: dict[str, list[Spec]] = {}
    for spec in fast:
        by_block.setdefault(spec.block_key, []).append(spec)
    blocks: list[ReweightedBlock] = []
    for key in sorted(by_block):
        try:
            block = ReweightedBlock(grid, frame, by_block[key], levels, n_levels, column, observed)
        except (_Unsupported, FegridError, np.linalg.LinAlgError, ValueError):  # the stacked refit decides (and says)
            rest.extend(by_block[key])
            continue
        rest.extend(block.left)
        if block.specs:
            blocks.append(block)
    return blocks, rest
