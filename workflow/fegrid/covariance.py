"""Covariance kinds: one registry, plain names, one statement of the small-sample conventions.

Conventions
-----------
Let ``N`` be the number of observations used, ``k`` the number of regressors kept (focal plus
non-collinear controls), ``A`` the degrees of freedom taken by the absorbed effects (see
:class:`fegrid.absorb.Absorber`; 1 for the intercept when nothing is absorbed), ``X`` the demeaned
regressors (scaled by the square root of the weights when weighted), ``e`` the residuals and
``B = (X'X)^{-1}``.

``homoskedastic``
    ``V = s^2 B`` with ``s^2 = e'e / (N - k - A)``; t distribution with ``N - k - A`` df.
``hc1`` (heteroskedasticity-robust; MacKinnon & White 1985)
    ``V = N / (N - k - A) * B (sum_i e_i^2 x_i x_i') B``; t with ``N - k - A`` df.
``clustered`` (one-way)
    ``V = G/(G-1) * (N-1)/(N-K) * B (sum_g u_g u_g') B`` with ``u_g = sum_{i in g} x_i e_i`` and
    ``K = k + A - A_nested``, where ``A_nested`` is the df of absorbed terms nested within the
    cluster variable, which do not count (Cameron & Miller 2015); t with ``G - 1`` df (common
    practice; Cameron & Miller 2015).
``two_way_clustered``
    ``V = V_1 + V_2 - V_12`` (Cameron, Gelbach & Miller 2011), each term the one-way formula with
    its own ``G``; ``V_12`` clusters on the intersection. Terms count as nested when nested in
    both variables. If ``V`` is not positive semi-definite its negative eigenvalues are set to zero
    (CGM 2011, section 2.3) and the result records it; t with ``min(G_1, G_2) - 1`` df.

Each kind also has a ``canonical_name`` (its name in fegrid 0.2: iid, robust, cluster, twoway),
which spec ids hash, so that renaming a kind never changes an id.
"""

from __future__ import annotations

import functools
import weakref
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import numpy as np

from .errors import EstimationError

__all__ = ["COVARIANCE_KINDS", "CovarianceOutcome", "Crosses", "FitPieces", "covariance_kind", "cluster_sums",
           "fused_fit", "n_clusters", "score_crosses"]


class Crosses(NamedTuple):
    """One clustering's cross products of a regression's cluster sums, computed ahead (:func:`fused_fit`)."""

    codes: np.ndarray | None  # the cluster codes (None: each row its own cluster)
    scores: np.ndarray | None  # U'U for the scores' sums U (None when only the focal variance is asked for)
    he: float  # the sum of squares of h e's sums
    n_groups: int


@dataclass(frozen=True)
class FitPieces:
    """What a covariance kind needs from one fitted specification.

    ``e`` are the residuals and ``h = X B[:, 0]`` the focal row of ``B X'`` (both scaled by the
    square root of the weights), so that the focal element of every sandwich ``B M B`` is a sum
    over observations or clusters of ``h e``: one pass over the data per clustering, whatever the
    number of controls. ``scores()`` gives ``X * e`` (Fortran order), for the kinds that need the
    whole covariance matrix; :meth:`score_sums` their sums per cluster, computed once per cluster
    variable for all of the regression's covariance choices.
    """

    estimate: float
    e: np.ndarray
    h: np.ndarray
    rss: float
    bread: np.ndarray
    within_r2: float
    scores: Callable[[], np.ndarray]
    coefficients: np.ndarray | None = None  # every kept coefficient, focal first
    _sums: dict[int, tuple[np.ndarray, tuple[np.ndarray, int]]] = field(default_factory=dict, repr=False,
                                                                        compare=False)
    _runs: list[tuple[int, np.ndarray, np.ndarray]] = field(default_factory=list, repr=False, compare=False)
    #: cross products computed ahead (:func:`fused_fit`), by the id of the codes (-1: each row its own cluster)
    _crosses: dict[int, Crosses] = field(default_factory=dict, repr=False, compare=False)

    def _ahead(self, codes: np.ndarray | None) -> Crosses | None:
        got = self._crosses.get(-1 if codes is None else id(codes))
        return got if got is not None and got.codes is codes else None

    def score_cross(self, codes: np.ndarray | None) -> tuple[np.ndarray, int]:
        """``U'U`` for the scores' sums ``U`` by cluster of ``codes`` (``None``: each row its own cluster),
        and the number of clusters."""
        got = self._ahead(codes)
        if got is not None and got.scores is not None:
            return got.scores, got.n_groups
        if codes is None:
            scores = self.scores()
            return scores.T @ scores, len(scores)
        u, g = self.score_sums(codes)
        return u.T @ u, g

    def he_square(self, codes: np.ndarray | None) -> tuple[float, int]:
        """The sum of squares of :attr:`he`'s sums by cluster of ``codes`` (``None``: each row its own
        cluster), and the number of clusters."""
        got = self._ahead(codes)
        if got is not None:
            return got.he, got.n_groups
        if codes is None:
            return float(self.he @ self.he), len(self.he)
        sums, g = self.he_sums(codes)
        return float(sums @ sums), g

    def score_sums(self, codes: np.ndarray) -> tuple[np.ndarray, int]:
        """:func:`cluster_sums` of the scores by ``codes``, kept for the next covariance choice."""
        got = self._sums.get(id(codes))
        if got is None or got[0] is not codes:  # (the codes are held with their sums: an id stays theirs)
            got = (codes, cluster_sums(self.scores(), codes, run_sums=self._run_sums))
            self._sums[id(codes)] = got
        return got[1]

    @functools.cached_property
    def he(self) -> np.ndarray:
        """``h e``, the focal variance's terms (computed once for all covariance choices)."""
        return self.h * self.e

    def he_sums(self, codes: np.ndarray) -> tuple[np.ndarray, int]:
        """:func:`cluster_sums` of :attr:`he` by ``codes``, their sums over runs of rows kept for the next
        covariance choice."""
        return cluster_sums(self.he, codes, run_sums=self._run_sums)

    def _run_sums(self, values: np.ndarray, starts: np.ndarray) -> np.ndarray:
        """``values`` (the scores, or ``h e``) summed over the runs of rows that begin at ``starts``, kept: the
        runs of one cluster variable are often another's clusters (a panel sorted by unit: each unit's rows
        are one run of its region), and those sums are the same numbers. The two kinds of values are told
        apart by their dimensions (the scores are (n, k), ``h e`` is (n,))."""
        for of, known, sums in self._runs:
            if of == values.ndim and (known is starts or np.array_equal(known, starts)):
                return sums
        sums = np.add.reduceat(values, starts, axis=0)
        self._runs.append((values.ndim, starts, sums))
        return sums


@dataclass(frozen=True)
class CovarianceOutcome:
    """Variance of the focal coefficient with the df of its t distribution."""

    variance: float
    df: float
    n_clusters: tuple[int, ...]
    psd_adjusted: bool = False


class _Layout(NamedTuple):
    """How the rows of one array of cluster codes are laid out, for summing values per cluster."""

    n_groups: int
    starts: np.ndarray | None  # where each cluster's run begins, when the codes are sorted and all present
    run_starts: np.ndarray | None  # where each run of equal codes begins, when runs are long (unsorted codes)
    run_codes: np.ndarray | None  # each run's code
    cycling: bool = False  # the codes run 0, 1, ..., G-1 over and over (periods of a balanced panel sorted by unit)


#: Cluster codes' layouts, by the id of the codes array (dropped when the array is freed): a design's
#: cluster variables serve every specification and covariance choice on its rows.
_LAYOUTS: dict[int, tuple[weakref.ref, _Layout]] = {}

#: Unsorted codes are first summed over runs of equal codes when there are at most this share of runs
#: per row (a region's units, each unit's rows together in a panel sorted by unit).
RUNS_SHARE = 0.25


def _layout(codes: np.ndarray) -> _Layout:
    """The layout of ``codes`` (computed once per array; codes arrays are never changed in place)."""
    key = id(codes)
    got = _LAYOUTS.get(key)
    if got is not None and got[0]() is codes:
        return got[1]
    n = len(codes)
    n_groups = int(codes.max()) + 1 if n else 0
    starts = run_starts = run_codes = None
    if 1 < n and n_groups < n:
        breaks = np.flatnonzero(codes[1:] != codes[:-1]) + 1
        if len(breaks) + 1 == n_groups and bool(np.all(codes[breaks] > codes[breaks - 1])) and codes[0] == 0:
            starts = np.concatenate([[0], breaks])  # sorted, every code present: one run per cluster
        elif len(breaks) + 1 <= RUNS_SHARE * n:
            run_starts = np.concatenate([[0], breaks])
            run_codes = codes[run_starts]
    cycling = bool(1 < n_groups < n and n % n_groups == 0 and starts is None and run_starts is None
                   and np.array_equal(codes.reshape(-1, n_groups), np.broadcast_to(np.arange(n_groups),
                                                                                 (n // n_groups, n_groups))))
    layout = _Layout(n_groups, starts, run_starts, run_codes, cycling)
    try:
        ref = weakref.ref(codes, lambda _, key=key: _LAYOUTS.pop(key, None))
    except TypeError:  # not weakly referable: computed each time
        return layout
    _LAYOUTS[key] = (ref, layout)
    return layout


def n_clusters(codes: np.ndarray) -> int:
    """The number of clusters of ``codes`` (``0..G-1``)."""
    return _layout(codes).n_groups


def cluster_sums(values: np.ndarray, codes: np.ndarray, *,
                 run_sums: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None) -> tuple[np.ndarray, int]:
    """Per-cluster sums of ``values`` (n,) or of each column of ``values`` (n, k); and ``G``. ``run_sums(values,
    starts)``, when given, sums ``values`` over the runs of rows that begin at ``starts`` (or gives such sums
    kept from before)."""
    layout = _layout(codes)
    n_groups = layout.n_groups
    if n_groups == len(codes):  # one observation per cluster (e.g. unit x period): the sums are the rows
        return values, n_groups
    if run_sums is None:
        def run_sums(values: np.ndarray, starts: np.ndarray) -> np.ndarray:
            return np.add.reduceat(values, starts, axis=0)
    if layout.starts is not None:  # sorted (a panel sorted by unit): one sum per run
        return run_sums(values, layout.starts), n_groups
    if layout.cycling:  # one row per cluster in each cycle: the cycles added in row order, as bincount does
        if values.ndim == 1:
            return values.reshape(-1, n_groups).sum(axis=0), n_groups
        if values.flags.f_contiguous:  # (each column's cycles as the rows of a view, without a copy)
            return values.T.reshape(values.shape[1], -1, n_groups).sum(axis=1).T, n_groups
        return values.reshape(-1, n_groups, values.shape[1]).sum(axis=0), n_groups
    if layout.run_starts is not None:  # long runs of one cluster: their sums first
        values, codes = run_sums(values, layout.run_starts), layout.run_codes
    if values.ndim == 1:
        return np.bincount(codes, values, minlength=n_groups), n_groups
    return np.column_stack([np.bincount(codes, values[:, j], minlength=n_groups)
                            for j in range(values.shape[1])]), n_groups


#: Rows per chunk of :func:`fused_fit`: a chunk of the design's columns, its residuals and its scores stay in
#: cache while every clustering's sums are taken from them.
FUSED_CHUNK = 16384


class _RunSums:
    """Sums of the scores and of ``h e`` over the runs of rows that begin at ``starts``, chunk by chunk (a run
    that crosses a chunk's end is finished in the next chunk)."""

    def __init__(self, starts: np.ndarray, width: int) -> None:
        self.starts = starts
        self.scores = np.empty((len(starts), width)) if width else None
        self.he = np.empty(len(starts))

    def add(self, a: int, b: int, block: np.ndarray | None, he: np.ndarray) -> None:
        first = int(np.searchsorted(self.starts, a, side="right")) - 1
        end = int(np.searchsorted(self.starts, b, side="left"))
        local = self.starts[first:end] - a
        going_on = bool(local[0] < 0)  # the chunk begins inside a run
        if going_on:
            local[0] = 0
        for out, values in ((self.scores, block), (self.he, he)):
            if out is None:
                continue
            sums = np.add.reduceat(values, local, axis=0)
            if going_on:
                out[first] += sums[0]
                out[first + 1: end] = sums[1:]
            else:
                out[first: end] = sums


class _Clustering:
    """One clustering's sums of a regression's scores and ``h e``, taken chunk by chunk in :func:`fused_fit`."""

    def __init__(self, codes: np.ndarray | None, n: int, width: int, runs: Callable[[np.ndarray], _RunSums]) -> None:
        self.codes = codes
        layout = _layout(codes) if codes is not None else None
        self.n_groups = n if layout is None else layout.n_groups
        self.runs: _RunSums | None = None
        self.scores: np.ndarray | None = None
        self.he: np.ndarray | float = 0.0
        if layout is None or self.n_groups == n:
            self.way = "rows"
            self.scores = np.zeros((width, width)) if width else None
        elif layout.starts is not None:
            self.way, self.runs = "runs", runs(layout.starts)
        elif layout.run_starts is not None:
            self.way, self.runs = "runs", runs(layout.run_starts)
        else:
            self.way = "cycle" if layout.cycling else "bins"
            self.scores = np.zeros((self.n_groups, width)) if width else None
            self.he = np.zeros(self.n_groups)

    def add(self, a: int, b: int, block: np.ndarray | None, he: np.ndarray) -> None:
        if self.way == "runs":
            return  # (their run sums are taken once for every clustering that shares them)
        if self.way == "rows":
            self.he += float(he @ he)
            if block is not None:
                self.scores += block.T @ block
            return
        g = self.n_groups
        if self.way == "cycle":  # whole cycles of codes 0..G-1 added together, the rows around them one by one
            m = b - a
            head = min(m, (-a) % g)
            stop = head + (m - head) // g * g
            for lo, hi in ((0, head), (stop, m)):
                if hi > lo:  # (fewer than G rows in a row: each code once)
                    piece = self.codes[a + lo: a + hi]
                    self.he[piece] += he[lo:hi]
                    if block is not None:
                        self.scores[piece] += block[lo:hi]
            if stop > head:  # (a row of ones times the cycles as the rows of a matrix: BLAS, not a strided sum)
                ones = np.ones((stop - head) // g)
                self.he += ones @ he[head:stop].reshape(-1, g)
                if block is not None:  # (each column's cycles as a view of the Fortran-order block)
                    self.scores += (ones @ block[head:stop].T.reshape(block.shape[1], -1, g)).T
            return
        codes = self.codes[a:b]
        self.he += np.bincount(codes, he, minlength=g)
        if block is not None:
            for j in range(block.shape[1]):
                self.scores[:, j] += np.bincount(codes, block[:, j], minlength=g)

    def crosses(self) -> Crosses:
        if self.way == "rows":
            return Crosses(self.codes, self.scores, float(self.he), self.n_groups)
        if self.way == "runs":
            scores, he = self.runs.scores, self.runs.he
            layout = _layout(self.codes)
            if layout.starts is None:  # runs of a cluster, not the clusters: their sums summed by cluster
                g, codes = self.n_groups, layout.run_codes
                he = np.bincount(codes, he, minlength=g)
                if scores is not None:
                    scores = np.column_stack([np.bincount(codes, scores[:, j], minlength=g)
                                              for j in range(scores.shape[1])])
        else:
            scores, he = self.scores, self.he
        return Crosses(self.codes, None if scores is None else scores.T @ scores, float(he @ he), self.n_groups)


def fused_fit(z: np.ndarray, weights: np.ndarray, columns: Sequence[int], clusterings: Sequence[np.ndarray | None],
              *, scores: bool) -> tuple[np.ndarray, dict[int, Crosses]]:
    """``eh = z @ weights`` (the residuals and ``h``, n x 2) and, for each of ``clusterings`` (cluster codes, or
    ``None`` for each row its own cluster), the cross products of the cluster sums of ``h e`` and (when
    ``scores``) of the scores ``z[:, columns] * e``: in one pass over ``z`` by chunks of
    :data:`FUSED_CHUNK` rows, instead of one pass for the residuals, one for the scores and one per
    clustering. Sums over runs of rows (a panel sorted by unit: each unit's rows, which are also runs of
    its region) are taken once for every clustering they serve. Each clustering's numbers depend on its
    own codes and the chunks only (not on the other clusterings asked for); they equal the one-pass sums
    up to the order of additions. Returns ``eh`` and :class:`Crosses` by the id of the codes (-1 for
    ``None``), for :class:`FitPieces`."""
    n = z.shape[0]
    width = len(columns) if scores else 0
    eh = np.empty((n, weights.shape[1]))
    kept_runs: list[_RunSums] = []

    def runs(starts: np.ndarray) -> _RunSums:
        for r in kept_runs:
            if r.starts is starts or np.array_equal(r.starts, starts):
                return r
        kept_runs.append(_RunSums(starts, width))
        return kept_runs[-1]

    parts = {(-1 if c is None else id(c)): _Clustering(c, n, width, runs) for c in clusterings}
    chunk = min(n, FUSED_CHUNK)
    block = np.empty((width, chunk)).T if width else None  # Fortran order: each score's column in a row
    e, he = np.empty(chunk), np.empty(chunk)
    used = np.flatnonzero(np.any(weights != 0, axis=1))  # the columns in the residuals and h
    some = len(used) < z.shape[1]
    weights_used = np.ascontiguousarray(weights[used])
    for a in range(0, n, FUSED_CHUNK):
        b = min(n, a + FUSED_CHUNK)
        zc = z[a:b]
        part = np.matmul(zc[:, used] if some else zc, weights_used if some else weights, out=eh[a:b])
        ec = e[: b - a]
        ec[:] = part[:, 0]
        hc = np.multiply(part[:, 1], ec, out=he[: b - a])
        bc = None
        if block is not None:
            bc = block[: b - a]
            for c, j in enumerate(columns):
                np.multiply(zc[:, j], ec, out=bc[:, c])
        for r in kept_runs:
            r.add(a, b, bc, hc)
        for p in parts.values():
            p.add(a, b, bc, hc)
    return eh, {key: p.crosses() for key, p in parts.items()}


#: ``U'U`` for the scores' sums ``U`` by cluster of a variable's codes (``None``: each row its own cluster), and
#: the number of clusters.
CrossOf = Callable[[np.ndarray | None], tuple[np.ndarray, int]]


def score_crosses(scores: np.ndarray) -> CrossOf:
    """:data:`CrossOf` for scores (n, k), summed when asked."""
    def cross(codes: np.ndarray | None) -> tuple[np.ndarray, int]:
        if codes is None:
            return scores.T @ scores, len(scores)
        u, g = cluster_sums(scores, codes)
        return u.T @ u, g
    return cross


#: A number, or an array of them (one per draw)
Num = Any


class _Kind:
    """A covariance kind: callable on the fitted pieces of one specification.

    Calling a kind gives the focal coefficient's variance (one pass over ``h e``); :meth:`matrix`
    gives the whole covariance matrix of the kept coefficients from the scores, with the same
    small-sample factors, so that its first diagonal element equals the focal variance.
    """

    name = ""
    #: the name in spec ids' canonical content (fegrid 0.2's config name; kept so that ids never change)
    canonical_name = ""
    dimensions = 0

    def __call__(self, fit: FitPieces, *, n_params: int, absorbed_df: int, nested_df: int,
                 clusters: Sequence[np.ndarray]) -> CovarianceOutcome:
        raise NotImplementedError

    # The conventions of the module docstring, each stated once. They take numbers, or arrays of them (the
    # joint tests' draws, refitted together in fegrid.reweight, compute their sums their own way and
    # combine them here).

    def residual_df(self, n: Num, n_params: Num, absorbed_df: Num, nested_df: Num) -> Num:
        """``N - K``: the observations less the kept regressors and the absorbed df, of which the clustered
        kinds do not count those nested in the clusters."""
        if self.dimensions:
            return n - (n_params + absorbed_df - nested_df)
        return n - (n_params + absorbed_df)

    def scaled(self, total: np.ndarray | float, n: Num, dof: Num, groups: Num = 0) -> np.ndarray | float:
        """``total`` (the sum over observations or clusters of ``h e`` squared, or of the scores' cross
        products) times the kind's small-sample factor: ``1 / (N - K)`` (homoskedastic, ``total`` the
        residuals' sum of squares), ``N / (N - K)`` (HC1), ``G / (G - 1) * (N - 1) / (N - K)`` (clustered,
        ``groups`` the clusters ``G`` of the variable summed over). Arrays of draws broadcast over the
        trailing axes of ``total``."""
        def lead(a: Num) -> Num:
            return np.reshape(a, np.shape(a) + (1,) * (np.ndim(total) - np.ndim(a))) if np.ndim(a) else a

        if self.name == "homoskedastic":
            return total / lead(dof)
        if not self.dimensions:
            return lead(n / dof) * total
        return lead(groups / (groups - 1) * (n - 1) / dof) * total

    def inference_df(self, dof: Num, groups: Sequence[Num] = ()) -> Num:
        """The df of the t (and F) distributions: ``N - K`` or, clustered, the fewest clusters less one."""
        if not self.dimensions:
            return dof
        return groups[0] - 1 if self.dimensions == 1 else np.minimum(groups[0], groups[1]) - 1

    def t_df(self, n: int, k_total: int, clusters: Sequence[np.ndarray]) -> float:
        """:meth:`inference_df` from the cluster variables' codes."""
        if not self.dimensions:
            return float(self.checked_df(n, k_total, 0, 0))
        return float(self.inference_df(0, [n_clusters(c) for c in clusters[: self.dimensions]]))

    def meat(self, cross_of: CrossOf, n: int, *, n_params: int, absorbed_df: int, nested_df: int,
             clusters: Sequence[np.ndarray]) -> np.ndarray:
        """The scaled middle ``M`` of the sandwich ``B M B`` for the scores ``X * e`` of ``n`` rows, whose
        cluster sums' cross products ``cross_of`` gives (:func:`score_crosses`, or
        :meth:`FitPieces.score_cross`), with the kind's small-sample factors (the homoskedastic kind has
        none: see :meth:`matrix`)."""
        raise NotImplementedError

    def summed_over(self, clusters: Sequence[np.ndarray]) -> list[np.ndarray | None]:
        """The clusterings whose sums the kind takes (:func:`fused_fit` takes them ahead): the cluster variables'
        codes in ``clusters`` (with their intersection, two-way), or ``None`` for each row its own cluster."""
        return list(clusters) if self.dimensions else [None]

    def with_matrix(self, fit: FitPieces, *, n_params: int, absorbed_df: int, nested_df: int,
                    clusters: Sequence[np.ndarray]) -> tuple[CovarianceOutcome, np.ndarray]:
        """The focal coefficient's outcome and the whole matrix, computed together."""
        args = dict(n_params=n_params, absorbed_df=absorbed_df, nested_df=nested_df, clusters=clusters)
        return self(fit, **args), self.matrix(fit, **args)  # type: ignore[arg-type]

    def matrix(self, fit: FitPieces, *, n_params: int, absorbed_df: int, nested_df: int,
               clusters: Sequence[np.ndarray], psd: bool = True) -> np.ndarray:
        """The covariance matrix of every kept coefficient (focal first)."""
        b = fit.bread
        if isinstance(self, Iid):
            n = len(fit.e)
            return self.scaled(fit.rss, n, self.checked_df(n, n_params, absorbed_df, nested_df)) * b
        m = self.meat(fit.score_cross, len(fit.e), n_params=n_params, absorbed_df=absorbed_df, nested_df=nested_df,
                      clusters=clusters)
        v = b @ m @ b
        v = (v + v.T) / 2
        if psd and isinstance(self, TwoWay):
            v = clip_negative(v)[0]
        return v

    def checked_df(self, n: int, n_params: int, absorbed_df: int, nested_df: int) -> int:
        """:meth:`residual_df`, which must be positive."""
        dof = self.residual_df(n, n_params, absorbed_df, nested_df)
        if dof <= 0:
            raise EstimationError("no residual degrees of freedom are left")
        return dof


class Iid(_Kind):
    """Homoskedastic errors."""

    name = "homoskedastic"
    canonical_name = "iid"

    def summed_over(self, clusters: Sequence[np.ndarray]) -> list[np.ndarray | None]:
        return []  # (the residuals' sum of squares alone)

    def __call__(self, fit, *, n_params, absorbed_df, nested_df, clusters):  # type: ignore[override]
        n = len(fit.e)
        dof = self.checked_df(n, n_params, absorbed_df, nested_df)
        return CovarianceOutcome(self.scaled(fit.rss, n, dof) * float(fit.bread[0, 0]), dof, ())


class Robust(_Kind):
    """Heteroskedasticity-robust errors with the HC1 factor ``N / (N - k - A)``."""

    name = "hc1"
    canonical_name = "robust"

    def __call__(self, fit, *, n_params, absorbed_df, nested_df, clusters):  # type: ignore[override]
        n = len(fit.e)
        dof = self.checked_df(n, n_params, absorbed_df, nested_df)
        return CovarianceOutcome(self.scaled(fit.he_square(None)[0], n, dof), dof, ())

    def meat(self, cross_of, n, *, n_params, absorbed_df, nested_df, clusters):  # type: ignore[override]
        return self.scaled(cross_of(None)[0], n, self.checked_df(n, n_params, absorbed_df, nested_df))


class OneWay(_Kind):
    """Errors correlated within the groups of one cluster variable."""

    name = "clustered"
    canonical_name = "cluster"
    dimensions = 1

    def __call__(self, fit, *, n_params, absorbed_df, nested_df, clusters):  # type: ignore[override]
        n = len(fit.e)
        dof = self.checked_df(n, n_params, absorbed_df, nested_df)
        square, g = fit.he_square(clusters[0])
        if g < 2:
            raise EstimationError("the cluster variable has a single group in this sample")
        return CovarianceOutcome(self.scaled(square, n, dof, g), self.inference_df(dof, [g]), (g,))

    def meat(self, cross_of, n, *, n_params, absorbed_df, nested_df, clusters):  # type: ignore[override]
        dof = self.checked_df(n, n_params, absorbed_df, nested_df)
        uu, g = cross_of(clusters[0])
        if g < 2:
            raise EstimationError("the cluster variable has a single group in this sample")
        return self.scaled(uu, n, dof, g)


class TwoWay(_Kind):
    """Errors correlated within the groups of either of two cluster variables.

    ``clusters`` holds the codes of the two variables and of their intersection.
    """

    name = "two_way_clustered"
    canonical_name = "twoway"
    dimensions = 2

    def __call__(self, fit, *, n_params, absorbed_df, nested_df, clusters):  # type: ignore[override]
        return self.with_matrix(fit, n_params=n_params, absorbed_df=absorbed_df, nested_df=nested_df,
                                clusters=clusters)[0]

    def with_matrix(self, fit, *, n_params, absorbed_df, nested_df, clusters):  # type: ignore[override]
        """The focal variance is the clipped matrix's first element: one meat for both."""
        counts = [n_clusters(c) for c in clusters]
        v, adjusted = clip_negative(self.matrix(fit, n_params=n_params, absorbed_df=absorbed_df, nested_df=nested_df,
                                                clusters=clusters, psd=False))
        return CovarianceOutcome(float(v[0, 0]), int(self.inference_df(0, counts)), (counts[0], counts[1]),
                                 bool(adjusted)), v

    def meat(self, cross_of, n, *, n_params, absorbed_df, nested_df, clusters):  # type: ignore[override]
        dof = self.checked_df(n, n_params, absorbed_df, nested_df)
        meat = None
        for codes, sign in zip(clusters, TWO_WAY_SIGNS):
            uu, g = cross_of(codes)
            if g < 2:
                raise EstimationError("a cluster variable has a single group in this sample")
            part = sign * self.scaled(uu, n, dof, g)
            meat = part if meat is None else meat + part
        return meat


#: The signs of the two-way meat's parts: the first variable's, the second's, their intersection's.
TWO_WAY_SIGNS = (1.0, 1.0, -1.0)


def clip_negative(v: np.ndarray) -> tuple[np.ndarray, np.ndarray | bool]:
    """A symmetric matrix (k, k), or a stack of them (d, k, k), with negative eigenvalues set to zero
    (Cameron, Gelbach & Miller 2011, section 2.3), and whether each was changed."""
    eigval, eigvec = np.linalg.eigh(v)
    clip = eigval.min(axis=-1) < 0
    if v.ndim == 2:
        return ((eigvec * np.clip(eigval, 0, None)) @ eigvec.T if clip else v), bool(clip)
    if clip.any():
        v = v.copy()
        vecs = eigvec[clip]
        v[clip] = (vecs * np.clip(eigval[clip], 0, None)[:, None, :]) @ vecs.transpose(0, 2, 1)
    return v, clip


#: Registry of covariance kinds: the config's name -> estimator.
COVARIANCE_KINDS: dict[str, _Kind] = {k.name: k for k in (Iid(), Robust(), OneWay(), TwoWay())}


def covariance_kind(name: str) -> _Kind:
    """Look up a covariance kind by name; an unknown name lists the allowed ones."""
    try:
        return COVARIANCE_KINDS[name]
    except KeyError:
        raise EstimationError(
            f"unknown covariance kind '{name}'; the kinds are {', '.join(COVARIANCE_KINDS)}."
        ) from None
