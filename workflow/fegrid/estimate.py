"""Block evaluation: every specification that shares a sample, absorbed effects and weights.

A *block* is a set of specifications fitted on the same sample with the same absorbed effects and
weights. :func:`fit_block` evaluates all of them with as little repeated work as the algebra allows:

1. Specifications are grouped by their complete-case rows (rows with a missing value in a
   specification's own variables are dropped for that specification only); each group is one
   *design*: its singletons are removed and its absorbed effects compiled once.
2. Every outcome, focal regressor and control used in a design is demeaned once, together
   (Frisch-Waugh-Lovell: regressing demeaned variables gives the fixed-effects coefficients). The
   demeaned columns can be kept in a content-addressed store, so a later run reuses them.
3. Each control set is a sub-block of that demeaned matrix: its collinearity check and
   ``(X'X)^{-1}`` are computed once per focal regressor; each outcome's residuals once per control
   set; every covariance choice reuses the same residuals.
"""

from __future__ import annotations

import copy
import functools
import json
import zlib
from collections.abc import Callable, Collection, Sequence
from dataclasses import asdict, dataclass, field, fields, replace
from typing import Any, NamedTuple, Protocol

import numpy as np
import pandas as pd

from . import __version__, keys
from .absorb import Absorber, CodesOf, LevelCodes, Term, codes_on_rows, drop_singletons, float_columns, parse_absorb
from .covariance import FitPieces, OneWay, Robust, covariance_kind, fused_fit, score_crosses
from .defaults import DEFAULTS
from .errors import EstimationError
from .estimators import LEAST_SQUARES, POISSON, TWO_STAGE, CovarianceOf, Estimator, anderson_rubin, first_stage
from .lazy import LazyModule
from .poisson import irls, separated_rows
from .staggered import (
    EVENT_STUDY,
    IMPUTATION,
    INTERACTION_WEIGHTED,
    Cohorts,
    LinearEstimates,
    bacon_decomposition,
    cohorts_of,
    event_indicators,
    group_time,
    imputation_pieces,
    interaction_cells,
    interaction_weights,
    negative_weights,
    share_covariance,
    share_influence,
    wald_p_value,
)
from .wild import WildBootstrap, wild_cluster_test

special = LazyModule("scipy.special")

__all__ = [
    "Inference",
    "SpecRequest",
    "BlockSettings",
    "SpecResult",
    "Coefficients",
    "BlockFit",
    "DemeanStore",
    "fit_block",
    "fit_one",
    "RESULT_COLUMNS",
    "read_columns",
]

STATUS_OK = "ok"
STATUS_NOT_IDENTIFIED = "not_identified"
STATUS_FAILED = "failed"


@dataclass(frozen=True)
class Inference:
    """How standard errors are computed: a covariance kind and its cluster dimensions.

    Each dimension is a tuple of columns; several columns cluster on their interaction.
    """

    kind: str = "hc1"
    by: tuple[tuple[str, ...], ...] = ()
    bootstrap: WildBootstrap | None = None

    def __post_init__(self) -> None:
        need = covariance_kind(self.kind).dimensions
        if len(self.by) != need:
            raise EstimationError(
                f"covariance kind '{self.kind}' takes {need} cluster variable(s), got {len(self.by)}."
            )
        if self.bootstrap is not None and self.kind != "clustered":
            raise EstimationError("the wild cluster bootstrap needs kind 'clustered' (one cluster variable).")

    def canonical(self) -> dict[str, object]:
        # the kind's canonical name, not its config name: renaming a kind changes no spec id
        body: dict[str, object] = {"kind": covariance_kind(self.kind).canonical_name,
                                   "by": sorted(list(d) for d in self.by)}
        if self.bootstrap is not None:
            body["wild_bootstrap"] = asdict(self.bootstrap)
        return body

    def columns(self) -> tuple[str, ...]:
        return tuple(c for dim in self.by for c in dim)


@dataclass(frozen=True)
class SpecRequest:
    """One specification inside a block."""

    spec_id: str
    outcome: str
    focal: str
    controls: tuple[str, ...] = ()
    inference: Inference = field(default_factory=Inference)
    estimator: Estimator = field(default_factory=Estimator)


@dataclass(frozen=True)
class BlockSettings:
    """What every specification of a block shares."""

    absorb: tuple[Term, ...] = ()
    weights: str | None = None
    unit: str | None = None
    time: str | None = None
    treatment: str | None = None
    adoption: str | None = None
    keep_singletons: bool = DEFAULTS["estimation.singletons"] == "keep"
    tolerance: float = DEFAULTS["estimation.tolerance"]
    max_iterations: int = DEFAULTS["estimation.max_iterations"]
    level: float = DEFAULTS["confidence_level"]
    warn_min_clusters: int = DEFAULTS["inference_warnings.min_clusters"]
    warn_max_cluster_share: float = DEFAULTS["inference_warnings.max_cluster_share"]
    warn_min_treated_clusters: int = DEFAULTS["inference_warnings.min_treated_clusters"]
    warn_min_first_stage_f: float = DEFAULTS["inference_warnings.min_first_stage_f"]

    def demean_key(self) -> str:
        """Everything that decides the demeaned columns (level and warning thresholds do not),
        and the engine's version, so that columns demeaned by another version are never reused."""
        body = asdict(self)
        for key in ("level", "warn_min_clusters", "warn_max_cluster_share", "warn_min_treated_clusters",
                    "warn_min_first_stage_f", "treatment", "adoption"):
            body.pop(key)
        body["absorb"] = [t.canonical() for t in self.absorb]
        body["fegrid"] = __version__
        return json.dumps(body, sort_keys=True)


@dataclass(frozen=True)
class SpecResult:
    """The estimate of the focal coefficient of one specification with its diagnostics."""

    spec_id: str
    status: str
    message: str = ""
    estimate: float = float("nan")
    std_error: float = float("nan")
    t_stat: float = float("nan")
    p_value: float = float("nan")
    ci_low: float = float("nan")
    ci_high: float = float("nan")
    df_inference: float = float("nan")
    n_obs: int = 0
    n_singletons: int = 0
    n_clusters: int = 0
    clusters: str = ""
    absorbed_df: int = 0
    absorb_levels: str = ""
    within_r2: float = float("nan")
    outcome_mean: float = float("nan")
    outcome_sd: float = float("nan")
    iterations: int = 0
    converged: bool = True
    controls_dropped: str = ""
    focal_sd: float = float("nan")
    focal_sd_within: float = float("nan")
    focal_variance_share: float = float("nan")
    units_with_variation: int = 0
    psd_adjusted: bool = False
    inference_warning: str = ""
    largest_cluster_share: float = float("nan")
    treated_clusters: int = -1
    wild_p_value: float = float("nan")
    wild_ci_low: float = float("nan")
    wild_ci_high: float = float("nan")
    wild_draws: int = 0
    wild_weights: str = ""
    wild_enumerated: bool = False
    first_stage: str = ""
    effective_f: float = float("nan")
    kp_f: float = float("nan")
    partial_r2: float = float("nan")
    ar_p_value: float = float("nan")
    ar_ci_low: float = float("nan")
    ar_ci_high: float = float("nan")
    ar_set: str = ""
    n_separated: int = 0
    cohorts: int = -1
    never_treated_units: int = -1
    not_yet_treated_obs: int = -1
    decomposition: str = ""
    already_treated_weight: float = float("nan")
    negative_weights: int = -1
    negative_weight_sum: float = float("nan")
    sign_flip_sd: float = float("nan")
    pretrend_p_value: float = float("nan")
    uniform_critical: float = float("nan")

    def record(self) -> dict[str, object]:
        return asdict(self)


RESULT_COLUMNS: tuple[str, ...] = tuple(f.name for f in fields(SpecResult))


class DemeanStore(Protocol):
    """Where demeaned columns are kept between runs, addressed by content."""

    def get(self, key: str) -> tuple[np.ndarray, int, bool] | None: ...

    def put(self, key: str, values: np.ndarray, iterations: int, converged: bool) -> None: ...


class Coefficients(NamedTuple):
    """Every kept coefficient of one specification (focal first) with its covariance matrix."""

    terms: tuple[str, ...]
    estimates: np.ndarray
    covariance: np.ndarray
    df: float


@dataclass
class BlockFit:
    """Results of one block with counts of the work done."""

    results: list[SpecResult]
    coefficients: dict[str, Coefficients] = field(default_factory=dict)
    designs: int = 0
    columns_demeaned: int = 0
    columns_reused: int = 0
    #: with ``influence=True``: per specification fitted, the positions of its rows in the frame
    #: passed and the first-order influence of each row on the focal estimate (see :func:`fit_block`)
    influence: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)


_RESULT_FIELDS = frozenset(f.name for f in fields(SpecResult))


def _updated(result: SpecResult, **changes: Any) -> SpecResult:
    """``dataclasses.replace(result, **changes)`` without calling ``__init__`` on the result's many fields
    (it has no ``__post_init__``): a shallow copy with the changes, as ``replace`` passes the other fields
    on. About 3 us instead of 17 us; every specification takes it several times."""
    unknown = changes.keys() - _RESULT_FIELDS
    if unknown:
        raise TypeError(f"SpecResult has no field(s) {', '.join(sorted(unknown))}")
    new = copy.copy(result)
    for name, value in changes.items():
        object.__setattr__(new, name, value)
    return new


def _fmt_counts(pairs: dict[str, int]) -> str:
    return "; ".join(f"{k}={v}" for k, v in pairs.items())


class _Regressors(NamedTuple):
    """The regressors of one focal regressor and control set in a design."""

    columns: list[int]  # positions in the design's matrix, focal first (empty when not identified)
    bread: np.ndarray  # (X'X)^{-1} of those columns
    dropped: list[str]  # controls dropped, with the reason
    problem: str  # why the focal coefficient is not identified ("" when it is)


class _IvRegressors(NamedTuple):
    """The regressors and instruments of one 2SLS specification in a design."""

    columns: list[int]  # regressors: focal, other endogenous, exogenous controls (empty when not identified)
    instruments: list[int]  # excluded instruments, then the exogenous controls
    n_endogenous: int
    n_excluded: int
    bread: np.ndarray  # (X'P X)^{-1}
    dropped: list[str]
    problem: str


class _FocalDiagnostics(NamedTuple):
    """How much the focal regressor varies before and after absorbing the effects."""

    sd: float
    sd_within: float
    variance_share: float
    units_with_variation: int


class _Design:
    """Rows, absorbed effects and demeaned columns shared by specifications with the same rows."""

    def __init__(self, frame: pd.DataFrame, settings: BlockSettings, n_singletons: int,
                 design_key: str, codes_of: CodesOf) -> None:
        self.frame = frame
        self.codes_of = codes_of
        self.settings = settings
        self.n_singletons = n_singletons
        self.key = design_key
        w = frame[settings.weights].to_numpy(dtype=float) if settings.weights else None
        self.w = np.ones(len(frame)) if w is None else w
        self.sqrt_w = np.sqrt(self.w)
        self.absorber = Absorber(frame, settings.absorb, weights=w, time=settings.time,
                                 tolerance=settings.tolerance,
                                 max_iterations=settings.max_iterations, codes_of=codes_of)
        self.ident_tol = max(1e-9, 1e3 * settings.tolerance)
        self.tilde: dict[str, np.ndarray] = {}
        self.iterations: dict[str, int] = {}
        self.converged: dict[str, bool] = {}
        self._clusters: dict[tuple[str, ...], np.ndarray] = {}
        self._controls: dict[tuple[str, ...], tuple[list[str], list[str]]] = {}
        self._regressors: dict[tuple[str, tuple[str, ...]], _Regressors] = {}
        self._fits: dict[tuple[str, str, tuple[str, ...]], FitPieces] = {}
        # each least-squares regression's clusterings (codes; None: each row its own), summed as it is fitted
        self.planned: dict[tuple[str, str, tuple[str, ...]], list[np.ndarray | None]] = {}
        self._diagnostics: dict[str, _FocalDiagnostics] = {}
        self._nested: dict[tuple[tuple[str, ...], ...], int] = {}
        self._poisson: dict[tuple[str, str, tuple[str, ...]], object] = {}  # one PML fit per regression
        # one staggered-adoption fit per regression, shared by its covariance choices
        self._staggered: dict[tuple[object, ...], object] = {}
        # the indicators' absorber and the indicators demeaned, weight-scaled
        self._indicators: dict[tuple[object, ...], tuple[Absorber, np.ndarray, np.ndarray]] = {}
        self.keep_all = True  # whether every coefficient is kept (not in the joint tests' draws)
        self.diagnostics = True  # 2SLS first-stage diagnostics, the imputation pretrend test (not in draws)
        self._cohorts: Cohorts | None = None
        self._cohort_counts: dict[str, int] | None = None
        self._column_keys: dict[str, str] = {}
        self._centred_norms: dict[str, float] = {}  # see prepare
        self._raw_squares: dict[str, float] = {}  # each demeaned column's sum of squares before, see usable
        self._demeaned: tuple[list[str], np.ndarray] | None = None  # the last columns demeaned together
        self._outcomes: dict[str, tuple[float, float]] = {}  # mean and sd of each outcome
        self.checks: dict[tuple[object, ...], Any] = {}  # see _cluster_checks
        self.positions = np.arange(len(frame))  # the rows' positions in the frame given to fit_block
        self.influence: dict[str, tuple[np.ndarray, np.ndarray]] | None = None  # see fit_block(influence=True)

    def nested_df(self, dims: tuple[tuple[str, ...], ...]) -> int:
        """Absorbed df nested in every cluster dimension (memoised per clustering)."""
        if dims not in self._nested:
            self._nested[dims] = self.absorber.nested_df([self.cluster_codes(d) for d in dims])
        return self._nested[dims]

    def outcome_moments(self, outcome: str) -> tuple[float, float]:
        """Mean and standard deviation of an outcome on the design's rows."""
        if outcome not in self._outcomes:
            y = self.frame[outcome].to_numpy(dtype=float)
            self._outcomes[outcome] = (float(y.mean()) if len(y) else float("nan"),
                                       float(y.std(ddof=1)) if len(y) > 1 else float("nan"))
        return self._outcomes[outcome]

    def column_key(self, column: str) -> str:
        """Key of a demeaned column in a store: the design and the column's values on its rows
        (hashed once, whether the column is then read from the store or written to it)."""
        if column not in self._column_keys:
            self._column_keys[column] = keys.demeaned_key(self.key, column, keys.column_key(self.frame[column]))
        return self._column_keys[column]

    def demean(self, columns: Sequence[str], store: DemeanStore | None) -> tuple[int, int]:
        todo = [c for c in columns if c not in self.tilde]
        reused = 0
        if store is not None:
            missing = []
            for c in todo:
                got = store.get(self.column_key(c))
                if got is None or len(got[0]) != len(self.frame):
                    missing.append(c)
                else:
                    self.tilde[c], self.iterations[c], self.converged[c] = got
                    reused += 1
            todo = missing
        if todo:
            raw = float_columns(self.frame, todo)
            with np.errstate(over="ignore", invalid="ignore"):
                for j, c in enumerate(todo):  # (for usable(), before the columns are demeaned in place)
                    self._raw_squares[c] = float(raw[:, j] @ raw[:, j])
            out = self.absorber.demean(raw, overwrite=True)
            self._demeaned = (list(todo), out.values)
            assert out.centred_norms is not None
            for j, c in enumerate(todo):
                vals = np.ascontiguousarray(out.values[:, j])
                self.tilde[c] = vals
                self._centred_norms[c] = float(out.centred_norms[j])
                self.iterations[c] = int(out.iterations[j])
                self.converged[c] = bool(out.converged[j])
                if store is not None:
                    store.put(self.column_key(c), vals, self.iterations[c], self.converged[c])
        return len(todo), reused

    def usable(self, column: str) -> bool:
        """Whether a demeaned column can enter a regression: finite, and its sums of squares before and after
        demeaning too (a column with infinite values, or values so large that their squares overflow)."""
        demeaned = self.tilde[column]
        with np.errstate(over="ignore", invalid="ignore"):
            if column not in self._raw_squares:
                raw = self.frame[column].to_numpy(dtype=float)
                self._raw_squares[column] = float(raw @ raw)
            return bool(np.isfinite(demeaned @ demeaned) and np.isfinite(self._raw_squares[column]))

    def cluster_codes(self, dim: tuple[str, ...]) -> np.ndarray:
        if dim not in self._clusters:
            self._clusters[dim] = self.codes_of(dim)
        return self._clusters[dim]

    def prepare(self, columns: Sequence[str]) -> None:
        """Stack the demeaned (weight-scaled) columns into ``Z`` and keep the R factor of ``Z = QR``.

        Every specification of the design is then a column subset: ``X'X = R_s'R_s`` for the
        subset's columns ``R_s`` of ``R``, so collinearity checks, coefficients and residual sums
        of squares are small dense algebra, exactly as stable as a QR of ``X`` itself.
        """
        self.columns = list(columns)
        self.pos = {c: j for j, c in enumerate(self.columns)}
        n, m = len(self.frame), len(self.columns)
        unweighted = self.settings.weights is None
        # the columns demeaned together, in this order, already are Z (unweighted): no copy
        same = self._demeaned is not None and self._demeaned[0] == self.columns
        self.Z = self._demeaned[1] if same and unweighted else np.empty((n, m), order="F")  # type: ignore[index]
        self._demeaned = None
        self.raw_norm = np.empty(m)
        wsum = self.w.sum()
        for j, c in enumerate(self.columns):
            if not unweighted:
                np.multiply(self.tilde[c], self.sqrt_w, out=self.Z[:, j])
            elif not same:
                self.Z[:, j] = self.tilde[c]
            if c in self._centred_norms:  # the weighted norm of the centred column, from the demeaning
                self.raw_norm[j] = self._centred_norms[c]
                continue
            raw = self.frame[c].to_numpy(dtype=float)
            centred = raw - np.dot(self.w, raw) / wsum
            self.raw_norm[j] = np.sqrt(np.dot(self.w * centred, centred))
        self.R = tall_r(self.Z)
        self.norm = np.linalg.norm(self.R, axis=0)

    def _absorbed(self, j: int) -> bool:
        return bool(self.norm[j] <= self.ident_tol * max(self.raw_norm[j], 1e-300))

    def _residual_norm(self, j: int, kept: list[int]) -> float:
        if not kept:
            return float(self.norm[j])
        rk = self.R[:, kept]
        coef = np.linalg.lstsq(rk, self.R[:, j], rcond=None)[0]
        return float(np.linalg.norm(self.R[:, j] - rk @ coef))

    def controls(self, controls: tuple[str, ...]) -> tuple[list[str], list[str]]:
        """Kept controls and the dropped ones with the reason, in the controls' (sorted) order."""
        if controls not in self._controls:
            kept: list[str] = []
            dropped: list[str] = []
            for c in controls:
                j = self.pos[c]
                if self._absorbed(j):
                    dropped.append(f"{c} (absorbed)")
                elif self._residual_norm(j, [self.pos[k] for k in kept]) <= 1e-7 * self.norm[j]:
                    dropped.append(f"{c} (collinear)")
                else:
                    kept.append(c)
            self._controls[controls] = (kept, dropped)
        return self._controls[controls]

    def regressors(self, focal: str, controls: tuple[str, ...]) -> _Regressors:
        """The focal regressor with a control set: kept columns, ``(X'X)^{-1}``, dropped controls, problem."""
        key = (focal, controls)
        if key not in self._regressors:
            kept, dropped = self.controls(controls)
            j = self.pos[focal]
            idx = [j] + [self.pos[c] for c in kept]
            problem = ""
            if self.raw_norm[j] == 0:
                problem = f"the focal regressor '{focal}' is constant in this sample"
            elif self._absorbed(j):
                problem = (f"the focal regressor '{focal}' is absorbed by the fixed effects "
                           f"({', '.join(self.absorber.levels) or 'intercept'}): it does not vary "
                           "within their groups")
            elif self._residual_norm(j, idx[1:]) <= 1e-7 * self.norm[j]:
                problem = (f"the focal regressor '{focal}' is collinear with the controls "
                           f"{', '.join(kept)}")
            if problem:
                self._regressors[key] = _Regressors([], np.empty((0, 0)), dropped, problem)
            else:
                rs = self.R[:, idx]
                self._regressors[key] = _Regressors(idx, np.linalg.inv(rs.T @ rs), dropped, "")
        return self._regressors[key]

    def iv_regressors(self, focal: str, controls: tuple[str, ...], estimator: Estimator) -> _IvRegressors:
        """Regressors and instruments of a 2SLS specification, with the identification checks:
        instruments absorbed by the effects or collinear with the controls are dropped (and named),
        and too few usable instruments, or a rank-deficient first stage, leave it not identified."""
        key = ("iv", focal, controls, estimator.instruments, estimator.endogenous)
        if key in self._regressors:
            return self._regressors[key]  # type: ignore[return-value]
        base = self.regressors(focal, tuple(c for c in controls if c not in estimator.endogenous))
        dropped = list(base.dropped)
        problem = base.problem
        kept, _ = self.controls(tuple(c for c in controls if c not in estimator.endogenous))
        exog = [self.pos[c] for c in kept]
        endog = [self.pos[focal]]
        for e in estimator.endogenous:
            if self._absorbed(self.pos[e]):
                problem = problem or f"the endogenous regressor '{e}' is absorbed by the fixed effects"
            endog.append(self.pos[e])
        excluded: list[int] = []
        for z in estimator.instruments:
            j = self.pos[z]
            if z in kept:
                dropped.append(f"{z} (instrument, also a control)")
            elif self._absorbed(j):
                dropped.append(f"{z} (instrument, absorbed)")
            elif self._residual_norm(j, exog + excluded) <= 1e-7 * self.norm[j]:
                dropped.append(f"{z} (instrument, collinear)")
            else:
                excluded.append(j)
        if not problem and len(excluded) < len(endog):
            problem = (f"under-identified: {len(excluded)} usable instrument(s) for {len(endog)} endogenous "
                       "regressor(s) once the fixed effects and controls are absorbed")
        ix, iw = endog + exog, excluded + exog
        bread = np.empty((0, 0))
        if not problem:
            rw, rx = self.R[:, iw], self.R[:, ix]
            swx = rw.T @ rx
            a = swx.T @ np.linalg.solve(rw.T @ rw, swx)
            if first_stage_deficient(a):
                problem = ("the instruments do not move the endogenous regressor(s) once the fixed effects "
                           "and controls are absorbed (rank-deficient first stage)")
            else:
                bread = np.linalg.inv(a)
        out = _IvRegressors([] if problem else ix, iw, len(endog), len(excluded), bread, dropped, problem)
        self._regressors[key] = out  # type: ignore[assignment]
        return out

    def fit_iv(self, outcome: str, reg: _IvRegressors) -> FitPieces:
        """Two-stage least squares on the demeaned columns: ``b = (X'PX)^{-1} X'Py`` with ``P`` the
        projection on the instruments; residuals use ``X`` itself, scores the fitted ``PX``."""
        yi = self.pos[outcome]
        rw = self.R[:, reg.instruments]
        swy = rw.T @ self.R[:, yi]
        pi = np.linalg.solve(rw.T @ rw, rw.T @ self.R[:, reg.columns])  # X on the instruments
        beta = reg.bread @ (pi.T @ swy)
        weights = np.zeros((len(self.columns), 2))
        weights[yi, 0] = 1.0
        weights[reg.columns, 0] -= beta
        weights[reg.instruments, 1] = pi @ reg.bread[:, 0]
        eh = self.Z @ weights
        e = eh[:, 0]
        rss = float(e @ e)
        tss = float(self.norm[yi] ** 2)
        fitted = self.Z[:, reg.instruments] @ pi
        return FitPieces(estimate=float(beta[0]), e=e, h=eh[:, 1], rss=rss, bread=reg.bread,
                         within_r2=1.0 - rss / tss if tss > 0 else float("nan"),
                         scores=lambda: fitted * e[:, None], coefficients=beta)

    def partial_out(self, columns: np.ndarray) -> np.ndarray:
        """Residuals of weight-scaled columns on the absorbed effects, in the weight-scaled space."""
        if self.settings.weights is None:
            return self.absorber.demean(columns).values
        scale = self.sqrt_w[:, None]
        return self.absorber.demean(columns / scale).values * scale

    def fit(self, outcome: str, focal: str, controls: tuple[str, ...]) -> FitPieces:
        key = (outcome, focal, controls)
        if key not in self._fits:
            self._fits.clear()  # keep one regression's residuals (specs arrive grouped by regression)
            idx, bread, _, _ = self.regressors(focal, controls)
            yi = self.pos[outcome]
            rs = self.R[:, idx]
            beta = bread @ (rs.T @ self.R[:, yi])
            resid = self.R[:, yi] - rs @ beta
            rss = float(resid @ resid)
            tss = float(self.norm[yi] ** 2)
            # residuals e and the focal row of (X'X)^{-1} X' (h), in one pass over Z
            weights = np.zeros((len(self.columns), 2))
            weights[yi, 0] = 1.0
            weights[idx, 0] -= beta
            weights[idx, 1] = bread[:, 0]
            # residuals and h with the sums of every covariance choice of the regression, in one pass over Z
            eh, crosses = fused_fit(self.Z, weights, idx, self.planned.get(key, []), scores=self.keep_all)
            self._fits[key] = FitPieces(
                estimate=float(beta[0]), e=eh[:, 0], h=eh[:, 1], rss=rss, bread=bread,
                within_r2=1.0 - rss / tss if tss > 0 else float("nan"),
                # cached for the regression's covariance choices; no reference back to the design
                scores=functools.cache(lambda z=self.Z, idx=idx, e=eh[:, 0]: _scores(z, idx, e)), coefficients=beta,
                _crosses=crosses)
        return self._fits[key]

    def focal_diagnostics(self, focal: str) -> _FocalDiagnostics:
        if focal not in self._diagnostics:
            self._diagnostics[focal] = self._focal_diagnostics(focal)
        return self._diagnostics[focal]

    def _focal_diagnostics(self, focal: str) -> _FocalDiagnostics:
        x = self.frame[focal].to_numpy(dtype=float)
        n = len(x)
        xt = self.tilde[focal]
        raw = float(self.raw_norm[self.pos[focal]])
        with_variation = 0
        unit = self.settings.unit
        if unit is not None and unit in self.frame:
            codes = self.codes_of((unit,))
            n_units = int(codes.max()) + 1
            cnt = np.bincount(codes, minlength=n_units)
            mean = np.bincount(codes, x, minlength=n_units) / np.maximum(cnt, 1)
            ss = np.bincount(codes, (x - mean[codes]) ** 2, minlength=n_units)
            scale = max(float(np.max(np.abs(x))), 1e-300) if n else 1.0
            with_variation = int(np.count_nonzero(ss > (1e-12 * scale) ** 2))
        return _FocalDiagnostics(
            sd=float(np.std(x, ddof=1)) if n > 1 else float("nan"),
            sd_within=float(np.sqrt(xt @ xt / (n - 1))) if n > 1 else float("nan"),
            variance_share=(float(xt @ xt if self.settings.weights is None else np.sum(self.w * xt * xt)) / raw**2
                            if raw > 0 else 0.0),
            units_with_variation=with_variation)


#: A 2SLS first stage is rank-deficient when the smallest eigenvalue of ``X'PX``, scaled to a unit
#: diagonal, is at most this (a condition number of 1e10, whatever the regressors' units).
FIRST_STAGE_RANK_TOL = 1e-10


def first_stage_rank(a: np.ndarray) -> float:
    """The smallest eigenvalue of ``X'PX`` (``a``) scaled to a unit diagonal, against which
    :data:`FIRST_STAGE_RANK_TOL` is compared: 0 when a regressor's fitted values vanish. Scaling
    makes the check independent of the regressors' units (hours or seconds of work, say)."""
    d = np.sqrt(np.clip(np.diag(a), 0.0, None))
    if not np.all(d > 0):
        return 0.0
    scaled = a / np.outer(d, d)
    return float(np.linalg.eigvalsh((scaled + scaled.T) / 2).min())


def first_stage_deficient(a: np.ndarray) -> bool:
    """Whether the first stage ``X'PX`` (``a``) is rank-deficient (see :func:`first_stage_rank`)."""
    return first_stage_rank(a) <= FIRST_STAGE_RANK_TOL


def _scores(z: np.ndarray, idx: list[int], e: np.ndarray) -> np.ndarray:
    """``X * e`` for the columns ``idx`` of ``z`` (Fortran order)."""
    out = np.empty((len(e), len(idx)), order="F")
    for c, j in enumerate(idx):
        np.multiply(z[:, j], e, out=out[:, c])
    return out


#: Rows per chunk of :func:`tall_r`: a chunk's columns stay in cache while it is factorized.
QR_CHUNK = 4096


def tall_r(z: np.ndarray) -> np.ndarray:
    """The R factor of ``z = QR`` (m x m, ``z`` with at least as many rows as columns), by
    Householder QR of row chunks and then of their stacked R factors: the same backward-stable
    factorization in another order (tall-and-skinny QR; Demmel, Grigori, Hoemmen & Langou 2012),
    without a copy of the whole matrix."""
    n, m = z.shape
    if n <= 2 * QR_CHUNK:
        return np.linalg.qr(z, mode="r")
    parts = [np.linalg.qr(z[i: i + QR_CHUNK], mode="r") for i in range(0, n, QR_CHUNK)]
    return np.linalg.qr(np.vstack(parts), mode="r")[:m]


def _design_columns(settings: BlockSettings) -> list[str]:
    """Columns that define a design's projections: the absorbed effects' (and trends' time), weights."""
    cols = [c for term in settings.absorb for c in term.needed_columns(settings.time)]
    return list(dict.fromkeys(cols + ([settings.weights] if settings.weights else [])))


def _needed(spec: SpecRequest, settings: BlockSettings) -> list[str]:
    """Columns whose missing values drop a row from the specification."""
    cols = [spec.outcome, spec.focal, *spec.controls, *spec.estimator.columns(), *spec.inference.columns(),
            *_design_columns(settings)]
    return list(dict.fromkeys(cols))


def read_columns(spec: SpecRequest, settings: BlockSettings, available: Sequence[str]) -> list[str]:
    """Every column whose values can change the specification's result (its content, for
    :func:`fegrid.keys.content_key`): its own variables, the design's, and the panel's unit
    (diagnostics), when they are among the ``available`` columns."""
    cols = _needed(spec, settings) + [c for c in (settings.unit, settings.time) if c]
    if spec.focal == settings.treatment and settings.adoption:  # missing adoption = never treated: not in _needed
        cols.append(settings.adoption)
    return sorted(c for c in set(cols) if c in set(available))


def fit_block(
    frame: pd.DataFrame,
    settings: BlockSettings,
    specs: Sequence[SpecRequest],
    *,
    store: DemeanStore | None = None,
    data_key: str = "",
    evaluate: Collection[str] | None = None,
    coefficients: bool = True,
    influence: bool = False,
    diagnostics: bool = True,
) -> BlockFit:
    """Fit every specification of a block (or those named in ``evaluate``).

    Parameters
    ----------
    frame
        The block's sample (already filtered), with every column the specifications use.
    settings
        Absorbed effects, weights, panel keys, tolerance and confidence level.
    specs
        The specifications of the block. Specifications with the same complete-case rows share a
        design whose QR factor holds all their columns, so the last digits of a result depend on
        which specifications share its design: to refit some specifications of a block and get
        the same bytes as a fit of the whole block, pass the whole block and name the ones to fit
        in ``evaluate``.
    store
        Optional store of demeaned columns, reused across calls and runs.
    data_key
        An optional salt of every key in ``store``. The keys already hash the content of the rows
        and columns each demeaned column depends on, so a change elsewhere in the data (another
        unit's value, a new column) reuses every stored column it does not touch.

    evaluate
        Ids of the specifications to evaluate (default: all). The others only shape the designs;
        designs holding none of them are skipped.
    coefficients
        Keep every coefficient with its covariance matrix (:attr:`BlockFit.coefficients`); the
        bootstrap draws of the joint tests need the focal estimate only.
    influence
        Also give, per specification fitted, each row's first-order influence on the focal estimate
        (:attr:`BlockFit.influence`): ``psi_i`` such that the estimate with frequency weights ``c_i``
        is ``b + sum_i (c_i - 1) psi_i`` to first order. It is the row's term of every cluster-robust
        sandwich (``h_i e_i``, with the cohort shares' part for the interaction-weighted estimator,
        and the influence functions of the imputation and group-time estimators); the linearized
        joint tests (:func:`fegrid.joint.linearized_draws`) sum it by resampled level.
    diagnostics
        Add the first-stage diagnostics and the Anderson-Rubin set to 2SLS results, and the
        imputation estimator's test of parallel trends; the joint tests' draws, which read the
        estimate, SE and df only, leave them out.

    Returns
    -------
    BlockFit
        One :class:`SpecResult` per evaluated specification, in the order given.
    """
    wanted = set(evaluate) if evaluate is not None else {s.spec_id for s in specs}
    notna: dict[str, np.ndarray | None] = {}  # None: a value in every row
    every_row = np.ones(len(frame), dtype=bool)
    groups: dict[bytes, tuple[np.ndarray, list[int]]] = {}
    rows_of: dict[tuple[str, ...], tuple[bytes, np.ndarray]] = {}  # by the columns a specification needs
    for i, spec in enumerate(specs):
        needed = tuple(_needed(spec, settings))
        if needed not in rows_of:
            mask = None
            for col in needed:
                if col not in notna:
                    notna[col] = _present(frame[col])
                if notna[col] is not None:
                    mask = notna[col].copy() if mask is None else np.logical_and(mask, notna[col], out=mask)
            # (the key of every row is b"": packed bits of one or more rows are never empty)
            rows_of[needed] = (b"", every_row) if mask is None else (np.packbits(mask).tobytes(), mask)
        key, mask = rows_of[needed]  # specifications with the same rows share a design
        groups.setdefault(key, (mask, []))[1].append(i)

    results: list[SpecResult | None] = [None] * len(specs)
    level_codes = LevelCodes(frame)
    fit = BlockFit(results=[])
    for mask, members in groups.values():
        if not any(specs[i].spec_id in wanted for i in members):
            continue
        sub = frame if mask is every_row else frame.loc[mask]  # (designs read their rows, never write them)
        positions = np.arange(len(frame)) if mask is every_row else np.flatnonzero(mask)
        keep = np.ones(len(sub), dtype=bool)
        if settings.absorb and not settings.keep_singletons:
            keep = drop_singletons(sub, settings.absorb, codes_of=level_codes.on_rows(positions))
        rows = sub if keep.all() else sub.loc[keep]
        if len(rows) == 0:
            for i in (i for i in members if specs[i].spec_id in wanted):
                results[i] = SpecResult(specs[i].spec_id, STATUS_FAILED,
                                        "no observations are left after dropping rows with missing "
                                        "values and singletons")
            continue
        # the key of the design's stored columns (hashing its rows' keys: only when there is a store)
        design_key = "" if store is None else keys.design_key(
            settings.demean_key() + data_key, len(rows),
            {c: keys.column_key(rows[c]) for c in _design_columns(settings)})
        design = _Design(rows, settings, int((~keep).sum()), design_key, level_codes.on_rows(positions[keep]))
        design.keep_all = coefficients
        design.diagnostics = diagnostics
        design.positions = positions[keep]
        design.influence = {} if influence else None
        fit.designs += 1
        cols = sorted({c for i in members for c in (specs[i].outcome, specs[i].focal, *specs[i].controls,
                                                      *specs[i].estimator.columns())})
        done, reused = design.demean(cols, store)
        fit.columns_demeaned += done
        fit.columns_reused += reused
        # a column with infinite values (or values so large that their sums overflow) cannot enter
        # a regression: its specifications fail with the reason instead of taking the design down
        broken = {c for c in cols if not design.usable(c)}
        design.prepare([c for c in cols if c not in broken])
        design.planned = _clusterings(design, [specs[i] for i in members if specs[i].spec_id in wanted])
        # all covariance choices of one regression in a row: its residuals are computed once and
        # only one regression's n-vectors are held at a time
        for i in sorted((i for i in members if specs[i].spec_id in wanted),
                        key=lambda i: (specs[i].outcome, specs[i].focal, specs[i].controls,
                                       repr(specs[i].estimator))):
            bad = sorted(broken.intersection((specs[i].outcome, specs[i].focal, *specs[i].controls,
                                              *specs[i].estimator.columns())))
            if not bad:
                results[i], kept = _evaluate(design, specs[i], coefficients)
                if kept is not None:
                    fit.coefficients[specs[i].spec_id] = kept
                if design.influence is not None and results[i].status != STATUS_OK:
                    design.influence.pop(specs[i].spec_id, None)
                continue
            results[i] = SpecResult(
                specs[i].spec_id, STATUS_FAILED, f"the column(s) {', '.join(bad)} hold infinite values, or values "
                "too large to square without overflow (beyond about 1e154), in this sample", n_obs=len(design.frame),
                n_singletons=design.n_singletons)
        if design.influence is not None:
            fit.influence.update(design.influence)
        del design
    fit.results = [r for r in results if r is not None]
    return fit


def _clusterings(design: _Design, specs: Sequence[SpecRequest]) -> dict[tuple[str, str, tuple[str, ...]],
                                                                         list[np.ndarray | None]]:
    """The clusterings that each least-squares regression's covariance choices sum over (each kind's
    ``summed_over``; see :func:`fegrid.covariance.fused_fit`)."""
    plan: dict[tuple[str, str, tuple[str, ...]], dict[int, np.ndarray | None]] = {}
    for spec in specs:
        if spec.estimator.method != LEAST_SQUARES or spec.estimator.staggered is not None:
            continue
        codes = [design.cluster_codes(dim) for dim in spec.inference.by]
        wanted = plan.setdefault((spec.outcome, spec.focal, spec.controls), {})
        for c in covariance_kind(spec.inference.kind).summed_over(_covariance_codes(spec, codes, design.cluster_codes)):
            wanted[-1 if c is None else id(c)] = c
    return {key: list(wanted.values()) for key, wanted in plan.items()}


def _present(column: pd.Series) -> np.ndarray | None:
    """Where ``column`` holds a value (``notna``; for plain floats, where it equals itself, not NaN, without
    pandas), or ``None`` when it holds one in every row."""
    if isinstance(column.dtype, np.dtype) and column.dtype.kind == "f":
        values = column.to_numpy()
        present = np.equal(values, values)
    else:
        present = column.notna().to_numpy()
    return None if present.all() else present


def _base_result(design: _Design, spec: SpecRequest, dropped: list[str]) -> SpecResult:
    """What every row of a design reports, whatever its status."""
    cols = (spec.outcome, spec.focal, *spec.controls)
    focal = design.focal_diagnostics(spec.focal)
    mean, sd = design.outcome_moments(spec.outcome)
    return SpecResult(
        outcome_mean=mean, outcome_sd=sd,
        spec_id=spec.spec_id, status=STATUS_FAILED, n_obs=len(design.frame), n_singletons=design.n_singletons,
        absorbed_df=design.absorber.absorbed_df, absorb_levels=_fmt_counts(design.absorber.levels),
        iterations=max(design.iterations[c] for c in cols), converged=all(design.converged[c] for c in cols),
        controls_dropped="; ".join(dropped), focal_sd=focal.sd, focal_sd_within=focal.sd_within,
        focal_variance_share=focal.variance_share, units_with_variation=focal.units_with_variation)


def _evaluate(design: _Design, spec: SpecRequest, keep: bool) -> tuple[SpecResult, Coefficients | None]:
    """One specification of a design: its result, and every kept coefficient when ``keep``."""
    method = spec.estimator.method
    if method == POISSON:
        return _evaluate_poisson(design, spec, keep)
    if spec.estimator.staggered is not None:
        return _evaluate_staggered(design, spec, keep)
    two_stage = method == TWO_STAGE
    regressors = (design.iv_regressors(spec.focal, spec.controls, spec.estimator) if two_stage
                  else design.regressors(spec.focal, spec.controls))
    base = _base_result(design, spec, regressors.dropped)
    if regressors.problem:
        return replace(base, status=STATUS_NOT_IDENTIFIED, message=regressors.problem), None
    if two_stage:
        assert isinstance(regressors, _IvRegressors)
        pieces = design.fit_iv(spec.outcome, regressors)
    else:
        pieces = design.fit(spec.outcome, spec.focal, spec.controls)
    codes = [design.cluster_codes(dim) for dim in spec.inference.by]
    all_codes = _covariance_codes(spec, codes, design.cluster_codes)
    terms = [design.columns[j] for j in regressors.columns]
    result, kept = _inference(base, spec, pieces, design.absorber, design.nested_df(spec.inference.by), codes,
                              all_codes, design.frame, design.settings, terms, keep, design.checks)
    if result.status != STATUS_OK:
        return result, kept
    if design.influence is not None:
        _record_influence(design, spec, None, pieces.h * pieces.e)
    if two_stage:
        assert isinstance(regressors, _IvRegressors)
        if design.diagnostics:
            result = _with_first_stage(design, spec, regressors, codes, result)
    elif keep and spec.focal == design.settings.treatment:
        result = _with_adoption_diagnostics(design, spec, pieces, result)
    if spec.inference.bootstrap is not None and result.std_error > 0:
        result = (_without_wild(result) if two_stage else
                  _with_wild(design, spec, pieces, regressors.columns, codes[0], result.n_clusters, result))
    return result, kept


def _record_influence(design: _Design, spec: SpecRequest, rows: np.ndarray | None, values: np.ndarray | None) -> None:
    """Keep a specification's first-order influence on ``rows`` of the design (all when ``None``)
    when :func:`fit_block` is asked for it."""
    if design.influence is not None and values is not None:
        where = design.positions if rows is None else design.positions[rows]
        design.influence[spec.spec_id] = (where, np.asarray(values, dtype=float))


def _without_wild(result: SpecResult) -> SpecResult:
    """A 2SLS or Poisson PML result of a clustering choice that asks for the wild cluster bootstrap."""
    return replace(result, message="; ".join(filter(None, [
        result.message, "the wild cluster bootstrap is computed for least squares only"])))


def _covariance_codes(spec: SpecRequest, codes: list[np.ndarray],
                      cluster_of: Callable[[tuple[str, ...]], np.ndarray]) -> list[np.ndarray]:
    if len(codes) == 2:  # two-way clustering also sums over the intersection of the two
        return [*codes, cluster_of(spec.inference.by[0] + spec.inference.by[1])]
    return codes


def _inference(base: SpecResult, spec: SpecRequest, pieces: FitPieces, absorber: Absorber, nested_df: int,
               codes: list[np.ndarray], all_codes: list[np.ndarray], frame: pd.DataFrame, s: BlockSettings,
               terms: list[str], keep: bool, checks: dict | None = None) -> tuple[SpecResult, Coefficients | None]:
    """The focal coefficient's inference (and every coefficient's, when ``keep``) under the
    specification's covariance kind; shared by every estimator. ``codes`` are the cluster
    variables' codes, ``all_codes`` those with the intersection of two-way clustering; ``checks``
    keeps the clusters' checks for other specifications on the same rows (see :func:`_cluster_checks`)."""
    beta, r2 = pieces.estimate, pieces.within_r2
    kind = covariance_kind(spec.inference.kind)
    args = dict(n_params=pieces.bread.shape[0], absorbed_df=absorber.absorbed_df, nested_df=nested_df,
                clusters=all_codes)
    whole = keep and pieces.coefficients is not None
    try:
        cov, matrix = kind.with_matrix(pieces, **args) if whole else (kind(pieces, **args), None)
    except EstimationError as exc:
        return replace(base, message=str(exc), estimate=beta, within_r2=r2), None
    se = float(np.sqrt(cov.variance))
    if not (np.isfinite(beta) and np.isfinite(se)):
        return replace(base, message="the estimate or its standard error is not finite (numerical overflow: "
                       "check the scale of the variables)"), None
    notes = [base.message] if base.message else []
    if not base.converged:
        notes.append(f"alternating projections did not reach the tolerance in {s.max_iterations} iterations")
    if cov.psd_adjusted:
        notes.append("two-way covariance was not positive semi-definite: negative eigenvalues set to zero")
    clusters = {" x ".join(dim): g for dim, g in zip(spec.inference.by, cov.n_clusters)}
    result = _with_std_error(_updated(
        base, status=STATUS_OK, message="; ".join(notes), estimate=beta, df_inference=float(cov.df),
        n_clusters=min(cov.n_clusters) if cov.n_clusters else 0, clusters=_fmt_counts(clusters),
        within_r2=r2, psd_adjusted=cov.psd_adjusted), beta, se, cov.df, s.level)
    result = _cluster_checks(spec, frame, s, codes, result, checks)
    kept = None
    if matrix is not None:
        kept = Coefficients(tuple(terms), np.asarray(pieces.coefficients, dtype=float), matrix, float(cov.df))
    return result, kept


def _stacked_covariance(spec: SpecRequest, absorbed_df: int, nested_df: int,
                        all_codes: list[np.ndarray]) -> CovarianceOf:
    """The specification's covariance kind for several regressions on the same regressors (see
    :data:`fegrid.estimators.CovarianceOf`); a two-way matrix is left as it is (no eigenvalue
    clipping), so that it stays a quadratic function of the residuals."""
    kind = covariance_kind(spec.inference.kind)

    def covariance(w: np.ndarray, resid: np.ndarray) -> tuple[np.ndarray, float]:
        n, m = w.shape
        p = resid.shape[1]
        bread = np.linalg.inv(w.T @ w)
        df = kind.t_df(n, m + absorbed_df - (nested_df if kind.dimensions else 0), all_codes)
        if kind.dimensions == 0 and kind.name == "homoskedastic":
            return np.kron(resid.T @ resid / (n - m - absorbed_df), bread), df
        scores = np.column_stack([w * resid[:, [j]] for j in range(p)])
        meat = kind.meat(score_crosses(scores), n, n_params=m, absorbed_df=absorbed_df, nested_df=nested_df,
                         clusters=all_codes)
        big = np.kron(np.eye(p), bread)
        return big @ meat @ big, df

    return covariance


def _with_first_stage(design: _Design, spec: SpecRequest, reg: _IvRegressors, codes: list[np.ndarray],
                      result: SpecResult) -> SpecResult:
    """``result`` with the first-stage diagnostics and the Anderson-Rubin set of a 2SLS fit."""
    s = design.settings
    covariance = _stacked_covariance(spec, design.absorber.absorbed_df, design.nested_df(spec.inference.by),
                                     _covariance_codes(spec, codes, design.cluster_codes))
    w = design.Z[:, reg.instruments]
    endog = design.Z[:, reg.columns[: reg.n_endogenous]]
    try:
        fs = first_stage(w, reg.n_excluded, endog, covariance)
    except (np.linalg.LinAlgError, EstimationError) as exc:
        note = f"first-stage diagnostics failed: {exc}"
        return replace(result, message="; ".join(filter(None, [result.message, note])))
    names = [design.columns[j] for j in reg.instruments[: reg.n_excluded]]
    text = "; ".join(f"{n}={c:.6g}" for n, c in zip(names, fs.coefficients[:, 0]))
    strength = fs.effective_f if reg.n_endogenous == 1 else fs.kp_f
    label = "effective F" if reg.n_endogenous == 1 else "Kleibergen-Paap F"
    warning = result.inference_warning
    if np.isfinite(strength) and strength < s.warn_min_first_stage_f:
        warning = "; ".join(filter(None, [warning, f"weak first stage: {label} {strength:.3g} < "
                                                    f"{s.warn_min_first_stage_f:g}"]))
    out = replace(result, first_stage=text, effective_f=fs.effective_f, kp_f=fs.kp_f,
                  partial_r2=float(fs.partial_r2[0]), inference_warning=warning)
    if reg.n_endogenous == 1:
        ar = anderson_rubin(w, reg.n_excluded, design.Z[:, design.pos[spec.outcome]], endog[:, 0], covariance,
                            s.level)
        out = replace(out, ar_p_value=ar.p_value, ar_ci_low=ar.low, ar_ci_high=ar.high, ar_set=ar.description)
    return out


class _PoissonPieces(NamedTuple):
    """One Poisson PML regression of a design, shared by its covariance choices."""

    base: SpecResult | None  # the result's common fields, or the whole result when it stops early
    done: bool
    rows: np.ndarray | None = None
    sub: pd.DataFrame | None = None
    fit: object = None
    names: tuple[str, ...] = ()
    pieces: FitPieces | None = None


def _evaluate_poisson(design: _Design, spec: SpecRequest, keep: bool) -> tuple[SpecResult, Coefficients | None]:
    """Poisson PML of one specification on the design's rows, less the separated observations; the
    fit is shared by the specifications of the design that differ only in their covariance."""
    key = (spec.outcome, spec.focal, spec.controls)
    if key not in design._poisson:
        design._poisson[key] = _fit_poisson(design, spec)
    got = design._poisson[key]
    assert isinstance(got, _PoissonPieces) and got.base is not None
    if got.done:
        return replace(got.base, spec_id=spec.spec_id), None
    assert got.rows is not None and got.sub is not None and got.pieces is not None
    rows, sub, fit = got.rows, got.sub, got.fit
    base = replace(got.base, spec_id=spec.spec_id)

    def cluster_of(dim: tuple[str, ...]) -> np.ndarray:
        return np.unique(design.cluster_codes(dim)[rows], return_inverse=True)[1].ravel()

    codes = [cluster_of(dim) for dim in spec.inference.by]
    nested = fit.absorber.nested_df(codes) if codes else 0  # type: ignore[attr-defined]
    result, kept = _inference(base, spec, got.pieces, fit.absorber, nested, codes,  # type: ignore[attr-defined]
                              _covariance_codes(spec, codes, cluster_of), sub, design.settings, list(got.names), keep)
    if result.status == STATUS_OK and design.influence is not None:
        _record_influence(design, spec, rows, got.pieces.h * got.pieces.e)
    if spec.inference.bootstrap is not None and result.status == STATUS_OK:
        result = _without_wild(result)
    return result, kept


def _fit_poisson(design: _Design, spec: SpecRequest) -> _PoissonPieces:
    s = design.settings
    regressors = design.regressors(spec.focal, spec.controls)
    base = _base_result(design, spec, regressors.dropped)
    if regressors.problem:
        return _PoissonPieces(replace(base, status=STATUS_NOT_IDENTIFIED, message=regressors.problem), True)
    frame = design.frame
    y = frame[spec.outcome].to_numpy(dtype=float)
    negative = int(np.count_nonzero(y < 0))
    if negative:
        return _PoissonPieces(replace(base, message=f"Poisson PML needs a non-negative outcome: '{spec.outcome}' has "
                                      f"{negative} negative value(s) in this sample"), True)
    names = [spec.focal] + [design.columns[j] for j in regressors.columns[1:]]
    rows = separated_rows(frame, y, names, s.absorb, time=s.time, keep_singletons=s.keep_singletons,
                          tolerance=s.tolerance, max_iterations=s.max_iterations, codes_of=design.codes_of)
    n_sep = int(np.count_nonzero(~rows))
    sub = frame.iloc[np.flatnonzero(rows)]
    base = replace(base, n_separated=n_sep, n_obs=len(sub))
    if len(sub) == 0 or not (y[rows] > 0).any():
        return _PoissonPieces(replace(base, message="every observation is separated (its outcome is zero throughout "
                                      "its effect groups or where the regressors push it): Poisson PML has no "
                                      "estimate"), True)
    codes_of = codes_on_rows(design.codes_of, np.flatnonzero(rows))
    x = float_columns(sub, names)
    w = sub[s.weights].to_numpy(dtype=float) if s.weights else None
    # regressors that the separated observations leave constant within the effects are dropped
    check = Absorber(sub, s.absorb, weights=w, time=s.time, tolerance=s.tolerance,
                     max_iterations=s.max_iterations, codes_of=codes_of).demean(x).values
    raw = np.linalg.norm(x - x.mean(axis=0), axis=0)
    flat = np.linalg.norm(check, axis=0) <= design.ident_tol * np.maximum(raw, 1e-300)
    if flat[0]:
        return _PoissonPieces(replace(base, status=STATUS_NOT_IDENTIFIED, message=(
            f"the focal regressor '{spec.focal}' does not vary within the absorbed effects once the "
            f"{n_sep} separated observation(s) are removed")), True)
    dropped = [f"{c} (separated)" for c, f in zip(names, flat) if f]
    names = [c for c, f in zip(names, flat) if not f]
    x = x[:, ~flat]
    fit = irls(sub, y[rows], x, s.absorb, weights=w, time=s.time, tolerance=s.tolerance,
               max_iterations=s.max_iterations, codes_of=codes_of)
    w_user = np.ones(len(sub)) if w is None else w
    yk = y[rows]
    sw = np.sqrt(w_user * fit.mu)
    xs = np.asfortranarray(fit.demeaned * sw[:, None])
    e = (yk - fit.mu) * np.sqrt(w_user) / np.sqrt(fit.mu)
    try:
        bread = np.linalg.inv(xs.T @ xs)
    except np.linalg.LinAlgError:
        return _PoissonPieces(replace(base, message="the Poisson PML information matrix is singular"), True)
    pieces = FitPieces(estimate=float(fit.coefficients[0]), e=e, h=xs @ bread[:, 0], rss=float(e @ e), bread=bread,
                       within_r2=float("nan"), scores=lambda: xs * e[:, None], coefficients=fit.coefficients)
    notes = [] if fit.converged else [f"Poisson PML did not converge in {fit.iterations} steps"]
    base = replace(base, absorbed_df=fit.absorber.absorbed_df, absorb_levels=_fmt_counts(fit.absorber.levels),
                   iterations=fit.iterations, converged=fit.converged, message="; ".join(notes),
                   controls_dropped="; ".join(filter(None, [base.controls_dropped, *dropped])),
                   outcome_mean=float(yk.mean()), outcome_sd=float(yk.std(ddof=1)) if len(yk) > 1 else float("nan"))
    return _PoissonPieces(base, False, rows, sub, fit, tuple(names), pieces)


def _cohorts(design: _Design) -> Cohorts:
    """The adoption design of a design's rows (from data.adoption when declared, else from the treatment),
    computed once per design."""
    if design._cohorts is None:
        design._cohorts = _design_cohorts(design)
    return design._cohorts


def _design_cohorts(design: _Design) -> Cohorts:
    return rows_cohorts(design.frame, design.settings)


def rows_cohorts(frame: pd.DataFrame, s: BlockSettings) -> Cohorts:
    """The adoption design of a design's rows: from data.adoption when declared, else from the treatment
    (also the joint tests' draws computed from the copies, :mod:`fegrid.reweight`)."""
    assert s.unit and s.time and s.treatment
    if s.adoption:
        return cohorts_of(frame[s.unit].to_numpy(), frame[s.time].to_numpy(),
                          adoption=frame[s.adoption].to_numpy(dtype=float))
    return cohorts_of(frame[s.unit].to_numpy(), frame[s.time].to_numpy(),
                      treatment=frame[s.treatment].to_numpy(dtype=float))


def _with_counts(result: SpecResult, design: _Design) -> SpecResult:
    """``result`` with the design's cohort counts (counted once per design)."""
    if design._cohort_counts is None:
        design._cohort_counts = _cohorts(design).counts()
    counts = design._cohort_counts
    return replace(result, cohorts=counts["cohorts"], never_treated_units=counts["never_treated_units"],
                   not_yet_treated_obs=counts["not_yet_treated_obs"])


def _with_adoption_diagnostics(design: _Design, spec: SpecRequest, pieces: FitPieces,
                               result: SpecResult) -> SpecResult:
    """A least-squares fit of the treatment: cohort counts, the weights of de Chaisemartin &
    D'Haultfoeuille (2020) on the treated observations' effects and, for the two-way model without
    controls or weights on a balanced panel, the decomposition of Goodman-Bacon (2021)."""
    s = design.settings
    cohorts = _cohorts(design)
    result = _with_counts(result, design)
    contribution = pieces.h * design.sqrt_w  # the estimate is sum_i contribution_i y_i
    neg = negative_weights(contribution, cohorts.treated, result.estimate, design.w if s.weights else None)
    result = replace(result, negative_weights=neg.count, negative_weight_sum=neg.total, sign_flip_sd=neg.sign_flip_sd)
    two_way = sorted(json.dumps(t.canonical()) for t in s.absorb) == sorted(
        json.dumps(t.canonical()) for t in parse_absorb([s.unit, s.time]))
    if not (two_way and not spec.controls and not s.weights):
        return result
    try:
        table = bacon_decomposition(design.frame[spec.outcome].to_numpy(dtype=float), cohorts)
    except ValueError as exc:
        return replace(result, message="; ".join(filter(None, [result.message, f"no decomposition: {exc}"])))
    late = table["comparison"] == "later_vs_earlier"
    return replace(result, decomposition=table.to_json(orient="records", double_precision=12),
                   already_treated_weight=float(table.loc[late, "weight"].sum()))


def staggered_cluster_dim(inference: Inference, unit: str | None) -> tuple[str, ...]:
    """The clusters of an estimator with its own inference (and of the interaction-weighted estimator's
    cohort shares): the specification's one-way clusters, else the unit."""
    if inference.kind == "clustered":
        return inference.by[0]
    assert unit is not None
    return (unit,)


def _cluster_for_staggered(design: _Design, spec: SpecRequest) -> tuple[np.ndarray, str, str]:
    """The clusters of an estimator with its own inference (:func:`staggered_cluster_dim`), with the
    dimension's label and a note when the specification asked for something else."""
    dim = staggered_cluster_dim(spec.inference, design.settings.unit)
    note = "" if spec.inference.kind == "clustered" else (
        f"clustered by {dim[0]} (this estimator's inference is cluster-robust by unit or a declared cluster)")
    return design.cluster_codes(dim), " x ".join(dim), note


class _IndicatorFit(NamedTuple):
    """A least-squares fit on relative-period (or cohort x relative-period) indicators, shared by the
    covariance choices of a regression."""

    rows: np.ndarray  # the design's rows kept
    sub: pd.DataFrame
    absorber: Absorber
    pieces: FitPieces
    terms: list[str]  # the regressors: indicators, then controls
    combine: np.ndarray  # (reported rows, regressors): the reported combinations, then every coefficient
    reported: tuple[str, ...]
    # the interaction-weighted estimator: the variance its estimated cohort shares add to the aggregates
    # (their number, and the function of the kept rows' clusters)
    shares: tuple[int, Callable[[np.ndarray], np.ndarray]] | None = None
    # and the shares' first-order influence of each kept row on the aggregates (rows, aggregates)
    share_influence: Callable[[], np.ndarray] | None = None
    # and the variance they add to the reported (overall) aggregate alone, for the kept rows' clusters
    overall_share_variance: Callable[[np.ndarray], float] | None = None


def _evaluate_staggered(design: _Design, spec: SpecRequest, keep: bool) -> tuple[SpecResult, Coefficients | None]:
    """A staggered-adoption estimator of the treatment's effect on the design's rows."""
    method = spec.estimator.method
    s = design.settings
    options = spec.estimator.staggered
    assert options is not None
    key = (method, options, spec.outcome, spec.controls)
    if key not in design._staggered:
        design._staggered[key] = _fit_staggered(design, spec)
    got = design._staggered[key]
    if isinstance(got, SpecResult):  # refused or failed: the same for every covariance choice
        return replace(got, spec_id=spec.spec_id), None
    base = replace(_with_counts(_base_result(design, spec, []), design), n_obs=len(design.frame))
    if isinstance(got, _IndicatorFit):
        return _indicator_result(design, spec, base, got, keep)
    assert isinstance(got, _LinearPieces)
    clusters, label, note = _cluster_for_staggered(design, spec)
    try:
        estimates = got.compute(clusters)
    except ValueError as exc:  # the design or the clusters do not suit the estimator: say why
        return replace(base, status=STATUS_NOT_IDENTIFIED, message=str(exc)), None
    result, kept = _linear_result(base, spec, estimates, label, note, got.pretrend(estimates), s.level, keep)
    if result.status == STATUS_OK:
        _record_influence(design, spec, None, estimates.influence)
    return result, kept


class _LinearPieces(NamedTuple):
    """An estimator linear in the outcome (imputation, group-time effects), fitted once per regression:
    ``compute`` gives its estimates with their covariance for the clusters of a covariance choice."""

    compute: Callable[[np.ndarray], LinearEstimates]

    def pretrend(self, got: LinearEstimates) -> float:
        """The estimator's own test of parallel trends, else the Wald test of its pre-period estimates."""
        if np.isfinite(got.pretrend_p_value):
            return got.pretrend_p_value
        pre = [j for j, n in enumerate(got.names) if n.startswith("rel=-")]
        return wald_p_value(got.estimates[pre], got.covariance[np.ix_(pre, pre)], got.df)


def _fit_staggered(design: _Design, spec: SpecRequest) -> object:
    """The cluster-independent part of a staggered-adoption fit, or the refusal (a :class:`SpecResult`)."""
    method = spec.estimator.method
    s = design.settings
    options = spec.estimator.staggered
    assert options is not None
    cohorts = _cohorts(design)
    base = _with_counts(_base_result(design, spec, []), design)

    def refuse(why: str) -> SpecResult:
        return replace(base, status=STATUS_NOT_IDENTIFIED, message=why)

    if base.cohorts == 0:
        return refuse("no unit adopts the treatment inside this sample's periods")
    if method in (EVENT_STUDY, INTERACTION_WEIGHTED):
        return _fit_indicators(design, spec, base, cohorts)
    if s.weights:
        return refuse(f"method {method} does not take weights")
    y = design.frame[spec.outcome].to_numpy(dtype=float)
    if method == IMPUTATION:
        if any(t.kind != "effect" for t in s.absorb):
            return refuse("the imputation estimator takes absorbed effects without trends")
        codes = [design.codes_of(t.columns) for t in s.absorb]  # type: ignore[union-attr]
        x = design.frame[list(spec.controls)].to_numpy(dtype=float) if spec.controls else np.zeros((len(y), 0))
        try:
            pieces = imputation_pieces(y, cohorts, codes, x, options, pretrend=design.diagnostics,
                                       per_period=design.diagnostics)
        except ValueError as exc:
            return refuse(str(exc))
        return _LinearPieces(pieces.with_clusters)
    covariates = design.frame[list(spec.controls)].to_numpy(dtype=float) if spec.controls else None
    seed = zlib.crc32(f"{spec.outcome}|{spec.focal}".encode())  # the same draws for the design in every run
    # the multiplier bootstrap's band is for reading the event study: not needed in the joint tests' draws
    draws = options.draws if design.keep_all else 0

    def compute(clusters: np.ndarray) -> LinearEstimates:
        # without the ledger's diagnostics (the joint tests' draws), the overall estimate alone
        got, _ = group_time(y, cohorts, clusters, replace(options, draws=draws), seed=seed, level=s.level,
                            covariates=covariates, overall_only=not design.diagnostics)
        return got

    return _LinearPieces(compute)


def _linear_result(base: SpecResult, spec: SpecRequest, got: LinearEstimates, label: str, note: str,
                   pretrend: float, level: float, keep: bool) -> tuple[SpecResult, Coefficients | None]:
    """The result of an estimator that gives named estimates with their covariance (overall first)."""
    est, se = float(got.estimates[0]), float(np.sqrt(got.covariance[0, 0]))
    if not (np.isfinite(est) and np.isfinite(se)):
        return replace(base, message="the estimate or its standard error is not finite"), None
    notes = [m for m in (base.message, got.message, note) if m]
    result = _with_std_error(_updated(
        base, status=STATUS_OK, message="; ".join(notes), estimate=est, df_inference=got.df, n_obs=got.n_obs,
        n_clusters=got.n_clusters, clusters=f"{label}={got.n_clusters}", pretrend_p_value=pretrend,
        uniform_critical=got.uniform_critical), est, se, got.df, level)
    if spec.inference.bootstrap is not None:
        result = _without_wild(result)
    terms = (spec.focal, *got.names[1:])
    kept = Coefficients(terms, got.estimates, got.covariance, got.df) if keep else None
    return result, kept


def _fit_indicators(design: _Design, spec: SpecRequest, base: SpecResult, cohorts: Cohorts) -> object:
    """The two-way event study or the interaction-weighted estimator: least squares of the outcome on
    indicators (and the controls) with the specification's absorbed effects and weights; the reported
    estimate is a fixed linear combination of the indicators' coefficients."""
    s = design.settings
    options = spec.estimator.staggered
    assert options is not None
    shares = share_args = None
    if spec.estimator.method == EVENT_STUDY:
        rows = np.ones(len(design.frame), dtype=bool)
        x, names = event_indicators(cohorts, options)
        rel = np.array([int(n.split("=")[1]) for n in names])
        combine = np.vstack([(rel >= 0) / max(int((rel >= 0).sum()), 1), np.eye(len(names))])
        reported = [spec.focal, *names]
    else:
        try:
            cells = interaction_cells(cohorts, options)
        except ValueError as exc:
            return replace(base, status=STATUS_NOT_IDENTIFIED, message=str(exc))
        rows, x, names = cells.rows, cells.matrix, cells.names
        agg, agg_names = interaction_weights(cells, options)
        combine = np.vstack([agg, np.eye(len(names))])
        reported = [spec.focal, *agg_names[1:], *names]
        shares = (len(agg), lambda clusters, beta: share_covariance(cells, agg, beta[: len(names)], clusters))
        share_args = (cells, agg, len(names))
    whole = bool(rows.all())
    sub = design.frame if whole else design.frame.loc[rows]
    w = sub[s.weights].to_numpy(dtype=float) if s.weights else None
    sw = np.sqrt(w) if w is not None else np.ones(len(sub))
    # the indicators' rows and absorber, and the indicators demeaned, once per design for every outcome and
    # control set (the absorber demeans column by column, so the bytes are those of one demeaning of all
    # the columns together)
    key = (spec.estimator.method, options)
    if key not in design._indicators:
        absorber = design.absorber if whole else Absorber(
            sub, s.absorb, weights=w, time=s.time, tolerance=s.tolerance, max_iterations=s.max_iterations,
            codes_of=codes_on_rows(design.codes_of, np.flatnonzero(rows)))
        # indicators of cohort and period: alike units' rows hold the same values, so a table of cells
        # gives the same residuals (Absorber.demean_cells), when it applies
        on_cells = absorber.demean_cells(x)
        demeaned = (on_cells if on_cells is not None else absorber.demean(x)).values
        if w is not None:
            demeaned = demeaned * sw[:, None]
        design._indicators[key] = (absorber, demeaned, demeaned.T @ demeaned)
    absorber, indicators, indicators_gram = design._indicators[key]
    own = np.column_stack([sub[spec.outcome].to_numpy(dtype=float), float_columns(sub, spec.controls)])
    own = absorber.demean(own).values * sw[:, None]
    yz, controls = own[:, 0], own[:, 1:]
    k = indicators.shape[1]

    def times(v: np.ndarray) -> np.ndarray:
        """``xz @ v``, the regressors (indicators, then controls) without stacking them."""
        return indicators @ v[:k] + controls @ v[k:]

    # the cross products, not a QR factor: many indicator columns, and a QR of them costs 30 times more;
    # the indicators' own block once per design
    cross = indicators.T @ controls
    gram = np.block([[indicators_gram, cross], [cross.T, controls.T @ controls]])
    norms = np.sqrt(np.diag(gram))
    if len(norms) == 0 or norms.min() <= 1e-9 * max(norms.max(), 1e-300) or np.linalg.eigvalsh(
            gram / np.outer(norms, norms)).min() <= 1e-10:
        return replace(base, status=STATUS_NOT_IDENTIFIED, message=(
            "the relative-period indicators (or the controls) are collinear with the absorbed effects: without "
            "never-treated units, a two-way event study needs binned end points and a window inside the periods"))
    bread = np.linalg.inv(gram)
    bread = (bread + bread.T) / 2
    beta = bread @ np.concatenate([indicators.T @ yz, controls.T @ yz])
    e = yz - times(beta)
    full = np.zeros((combine.shape[0] + len(spec.controls), len(beta)))
    full[: combine.shape[0], : combine.shape[1]] = combine
    full[combine.shape[0]:, combine.shape[1]:] = np.eye(len(spec.controls))
    a = full[0]
    tss = float(yz @ yz)
    pieces = FitPieces(estimate=float(a @ beta), e=e, h=times(bread @ a), rss=float(e @ e), bread=bread,
                       within_r2=1.0 - float(e @ e) / tss if tss > 0 else float("nan"),
                       scores=lambda: np.asfortranarray(np.column_stack([indicators, controls]) * e[:, None]),
                       coefficients=beta)
    share_part = None if shares is None else (shares[0], lambda clusters: shares[1](clusters, beta))
    share_first = None if share_args is None else (
        lambda: share_influence(share_args[0], share_args[1], beta[: share_args[2]]))
    share_overall = None if share_args is None else (
        lambda clusters: float(share_covariance(share_args[0], share_args[1][:1], beta[: share_args[2]],
                                                clusters)[0, 0]))
    return _IndicatorFit(rows, sub, absorber, pieces, [*names, *spec.controls], full,
                         (*reported, *spec.controls), share_part, share_first, share_overall)


def _indicator_result(design: _Design, spec: SpecRequest, base: SpecResult, fit: _IndicatorFit,
                      keep: bool) -> tuple[SpecResult, Coefficients | None]:
    rows = fit.rows

    def cluster_of(dim: tuple[str, ...]) -> np.ndarray:
        return np.unique(design.cluster_codes(dim)[rows], return_inverse=True)[1].ravel()

    codes = [cluster_of(dim) for dim in spec.inference.by]
    nested = fit.absorber.nested_df(codes) if codes else 0
    base = replace(base, n_obs=len(fit.sub))
    share_dim = staggered_cluster_dim(spec.inference, design.settings.unit)
    if not (design.diagnostics or keep) and isinstance(covariance_kind(spec.inference.kind), (OneWay, Robust)):
        # the joint tests' draws: the reported combination's variance from its own h = X B a (the kinds
        # that are sums over h e: not the homoskedastic one, which reads B's first element, nor two-way,
        # whose clipped matrix is not such a sum), plus the shares' part for it alone; not the whole
        # matrix of every reported row, nor the pre-trend test
        result, _ = _inference(base, spec, fit.pieces, fit.absorber, nested, codes,
                               _covariance_codes(spec, codes, cluster_of), fit.sub, design.settings, fit.terms,
                               False)
        if result.status == STATUS_OK and fit.overall_share_variance is not None:
            se = float(np.sqrt(result.std_error ** 2 + fit.overall_share_variance(cluster_of(share_dim))))
            result = _with_std_error(result, result.estimate, se, result.df_inference, design.settings.level)
        if result.status == STATUS_OK:
            _record_indicator_influence(design, spec, fit)
        return result, None
    result, kept = _inference(base, spec, fit.pieces, fit.absorber, nested, codes,
                              _covariance_codes(spec, codes, cluster_of), fit.sub, design.settings, fit.terms, True)
    if result.status != STATUS_OK or kept is None:
        return result, None
    # every reported row: the combinations, then the coefficients (indicators and controls)
    cov = fit.combine @ kept.covariance @ fit.combine.T
    assert fit.pieces.coefficients is not None
    values = fit.combine @ fit.pieces.coefficients
    if fit.shares is not None:  # the cohort shares are estimated too: their variance adds to the aggregates
        n_agg, share_cov = fit.shares
        cov[:n_agg, :n_agg] += share_cov(cluster_of(share_dim))  # type: ignore[arg-type]
    # the reported estimate is a combination of the coefficients: its variance is the combination's
    # (a two-way matrix, made positive semi-definite as a whole, is not a sum over h e)
    result = _with_std_error(result, float(values[0]), float(np.sqrt(cov[0, 0])), kept.df, design.settings.level)
    pre = [j for j, n in enumerate(fit.reported) if n.startswith("rel=-")]
    result = replace(result, pretrend_p_value=wald_p_value(values[pre], cov[np.ix_(pre, pre)], kept.df))
    if spec.inference.bootstrap is not None:
        result = _without_wild(result)
    _record_indicator_influence(design, spec, fit)
    return result, (Coefficients(fit.reported, values, cov, kept.df) if keep else None)


def _with_std_error(result: SpecResult, estimate: float, se: float, df: float, level: float) -> SpecResult:
    """``result`` with the standard error ``se`` of ``estimate``, and the t statistic, p-value and
    confidence interval that follow (t with ``df`` degrees of freedom): the one place every estimator's
    result gets them."""
    crit = float(special.stdtrit(df, 0.5 + level / 2))
    t = estimate / se if se > 0 else float("nan")
    p_value = float(2 * special.stdtr(df, -abs(t))) if se > 0 else float("nan")
    return _updated(result, std_error=se, t_stat=t, p_value=p_value,
                    ci_low=estimate - crit * se, ci_high=estimate + crit * se)


def _record_indicator_influence(design: _Design, spec: SpecRequest, fit: _IndicatorFit) -> None:
    """The influence of an indicator estimator's rows on its reported estimate (with the cohort shares'
    part for the interaction-weighted estimator), when the fit asks for it."""
    if design.influence is not None:
        first = fit.pieces.h * fit.pieces.e
        _record_influence(design, spec, fit.rows, first if fit.share_influence is None
                          else first + fit.share_influence()[:, 0])


def _with_wild(design: _Design, spec: SpecRequest, pieces: FitPieces, idx: list[int], codes: np.ndarray,
               n_groups: int, result: SpecResult) -> SpecResult:
    """``result`` with the wild cluster restricted bootstrap of its focal coefficient."""
    boot = spec.inference.bootstrap
    assert boot is not None
    n = len(pieces.e)
    kind = covariance_kind(spec.inference.kind)  # one-way clustered: the wild bootstrap's clusters
    dof = kind.residual_df(n, pieces.bread.shape[0], design.absorber.absorbed_df, design.nested_df(spec.inference.by))
    wild = wild_cluster_test(
        y=design.Z[:, design.pos[spec.outcome]], x=design.Z[:, idx], bread=pieces.bread, codes=codes,
        factor=kind.scaled(1.0, n, dof, n_groups), estimate=result.estimate,
        std_error=result.std_error, settings=boot, key=spec.spec_id, level=design.settings.level,
        partial_out=None if design.absorber.nested_in(codes) else design.partial_out)
    return replace(result, wild_p_value=wild.p_value, wild_ci_low=wild.ci_low, wild_ci_high=wild.ci_high,
                   wild_draws=wild.draws, wild_weights=boot.weights, wild_enumerated=wild.enumerated)


def _cluster_checks(spec: SpecRequest, frame: pd.DataFrame, s: BlockSettings, codes: Sequence[np.ndarray],
                    result: SpecResult, cache: dict | None = None) -> SpecResult:
    """Warnings when clustered inference is fragile (MacKinnon & Webb 2017).

    Few clusters, one cluster holding a large share of the observations, or (for a 0/1 focal
    regressor) few clusters with any treated observation. Thresholds are the block settings'.
    They depend on the rows, the focal regressor and the clustering only: ``cache`` (one per
    design) keeps them for the design's other specifications.
    """
    if not codes:
        return result
    cache = {} if cache is None else cache
    key = (spec.focal, spec.inference.by)
    if key not in cache:
        cache[key] = _cluster_profile(spec, frame, s, codes, cache)
    notes, share, treated = cache[key]
    return _updated(result, inference_warning="; ".join(notes), largest_cluster_share=share,
                    treated_clusters=treated)


def _cluster_profile(spec: SpecRequest, frame: pd.DataFrame, s: BlockSettings, codes: Sequence[np.ndarray],
                     cache: dict[tuple[object, ...], Any]) -> tuple[list[str], float, int]:
    """The warnings, the largest cluster's share and the fewest treated clusters of one focal regressor and
    clustering; the focal values and the cluster sizes are kept in ``cache`` for the other clusterings."""
    notes = []
    shares, treated = [], []
    if ("focal", spec.focal) not in cache:
        x = frame[spec.focal].to_numpy(dtype=float)
        cache["focal", spec.focal] = (x, bool(np.isin(x, (0.0, 1.0)).all()))
    x, binary = cache["focal", spec.focal]
    for dim, c in zip(spec.inference.by, codes):
        name = " x ".join(dim)
        if ("sizes", dim) not in cache:
            cache["sizes", dim] = np.bincount(c)
        sizes = cache["sizes", dim]
        g = len(sizes)
        share = float(sizes.max() / sizes.sum())
        shares.append(share)
        if g < s.warn_min_clusters:
            notes.append(f"few clusters: {g} {name} < {s.warn_min_clusters}")
        if share > s.warn_max_cluster_share:
            notes.append(f"the largest {name} cluster holds {share:.0%} of the observations")
        if binary:
            n_treated = int(np.count_nonzero(np.bincount(c, x, minlength=g)))
            treated.append(n_treated)
            if n_treated < s.warn_min_treated_clusters:
                notes.append(f"few treated clusters: {n_treated} {name} with any treated observation")
    return notes, max(shares), min(treated) if treated else -1


def fit_one(
    frame: pd.DataFrame,
    outcome: str,
    focal: str,
    *,
    controls: Sequence[str] = (),
    absorb: tuple[Term, ...] = (),
    inference: Inference | None = None,
    weights: str | None = None,
    unit: str | None = None,
    time: str | None = None,
    keep_singletons: bool = DEFAULTS["estimation.singletons"] == "keep",
    tolerance: float = DEFAULTS["estimation.tolerance"],
    level: float = DEFAULTS["confidence_level"],
    estimator: Estimator | None = None,
    treatment: str | None = None,
    adoption: str | None = None,
) -> SpecResult:
    """Fit one specification; a convenience wrapper around :func:`fit_block`. ``treatment`` (and
    ``adoption``) declare a staggered adoption, as ``data.treatment`` and ``data.adoption`` do.

    Examples
    --------
    >>> import pandas as pd
    >>> from fegrid.absorb import parse_absorb
    >>> df = pd.DataFrame({"u": [1, 1, 2, 2, 3, 3], "x": [0., 1, 0, 2, 1, 0],
    ...                    "y": [1., 3, 0, 4, 5, 3]})
    >>> r = fit_one(df, "y", "x", absorb=parse_absorb(["u"]), inference=Inference("homoskedastic"))
    >>> round(r.estimate, 6), r.status
    (2.0, 'ok')
    """
    settings = BlockSettings(absorb=absorb, weights=weights, unit=unit, time=time, treatment=treatment,
                             adoption=adoption, keep_singletons=keep_singletons, tolerance=tolerance, level=level)
    spec = SpecRequest("one", outcome, focal, tuple(controls), inference or Inference(), estimator or Estimator())
    return fit_block(frame, settings, [spec]).results[0]
