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

__all__ = ["COVARIANCE_KINDS", "CovarianceOutcome", "FitPieces", "covariance_kind", "cluster_sums", "n_clusters"]


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


#: The scores' cluster sums (and the number of clusters) by a cluster variable's codes.
SumsOf = Callable[[np.ndarray], tuple[np.ndarray, int]]
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

    def meat(self, scores: np.ndarray, *, n_params: int, absorbed_df: int, nested_df: int,
             clusters: Sequence[np.ndarray], sums_of: SumsOf | None = None) -> np.ndarray:
        """The scaled middle ``M`` of the sandwich ``B M B`` for scores ``X * e`` (n, k), with the
        kind's small-sample factors (the homoskedastic kind has none: see :meth:`matrix`).
        ``sums_of(codes)`` gives the scores' cluster sums when they are kept (default: summed here)."""
        raise NotImplementedError

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
        m = self.meat(fit.scores(), n_params=n_params, absorbed_df=absorbed_df, nested_df=nested_df,
                      clusters=clusters, sums_of=fit.score_sums)
        v = b @ m @ b
        v = (v + v.T) / 2
        if psd and isinstance(self, TwoWay):
            v = clip_negative(v)[0]
        return v

    @staticmethod
    def _sums(scores: np.ndarray, codes: np.ndarray, sums_of: SumsOf | None) -> tuple[np.ndarray, int]:
        """The scores' cluster sums by ``codes`` and their number of clusters: kept ones (``sums_of``), or
        summed here."""
        return sums_of(codes) if sums_of is not None else cluster_sums(scores, codes)

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
        he = fit.h * fit.e
        return CovarianceOutcome(self.scaled(float(he @ he), n, dof), dof, ())

    def meat(self, scores, *, n_params, absorbed_df, nested_df, clusters, sums_of=None):  # type: ignore[override]
        n = scores.shape[0]
        return self.scaled(scores.T @ scores, n, self.checked_df(n, n_params, absorbed_df, nested_df))


class OneWay(_Kind):
    """Errors correlated within the groups of one cluster variable."""

    name = "clustered"
    canonical_name = "cluster"
    dimensions = 1

    def __call__(self, fit, *, n_params, absorbed_df, nested_df, clusters):  # type: ignore[override]
        n = len(fit.e)
        dof = self.checked_df(n, n_params, absorbed_df, nested_df)
        sums, g = fit.he_sums(clusters[0])
        if g < 2:
            raise EstimationError("the cluster variable has a single group in this sample")
        return CovarianceOutcome(self.scaled(float(sums @ sums), n, dof, g), self.inference_df(dof, [g]), (g,))

    def meat(self, scores, *, n_params, absorbed_df, nested_df, clusters, sums_of=None):  # type: ignore[override]
        n = scores.shape[0]
        dof = self.checked_df(n, n_params, absorbed_df, nested_df)
        u, g = self._sums(scores, clusters[0], sums_of)
        if g < 2:
            raise EstimationError("the cluster variable has a single group in this sample")
        return self.scaled(u.T @ u, n, dof, g)


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

    def meat(self, scores, *, n_params, absorbed_df, nested_df, clusters, sums_of=None):  # type: ignore[override]
        n = scores.shape[0]
        dof = self.checked_df(n, n_params, absorbed_df, nested_df)
        meat = np.zeros((scores.shape[1], scores.shape[1]))
        for codes, sign in zip(clusters, TWO_WAY_SIGNS):
            u, g = self._sums(scores, codes, sums_of)
            if g < 2:
                raise EstimationError("a cluster variable has a single group in this sample")
            meat += sign * self.scaled(u.T @ u, n, dof, g)
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
