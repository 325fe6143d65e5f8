"""The estimator dimension: least squares, two-stage least squares, Poisson pseudo-maximum likelihood.

An :class:`Estimator` is one choice of the grid's ``estimators`` dimension. Least squares is the
default, and a least-squares specification's canonical content (so its id) is what it was before
the dimension existed. The other methods add their own keys to the content.

This module also holds the instrumental-variable diagnostics, computed on columns from which the
absorbed effects and the exogenous controls have been partialled out (Frisch-Waugh-Lovell holds
for the projections of two-stage least squares):

* first-stage coefficients and partial R-squared of the excluded instruments;
* the effective first-stage F of Montiel Olea & Pflueger (2013) for one endogenous regressor,
  ``F_eff = pi' Z'Z pi / tr(Z'Z V_pi)``, where ``V_pi`` is the covariance of the first-stage
  coefficients under the specification's own covariance kind;
* the Kleibergen & Paap (2006) rk Wald statistic for under-identification of several endogenous
  regressors, reported as an F (divided by the number of excluded instruments); with one
  endogenous regressor it is the Wald statistic of the first stage divided by that number;
* for one endogenous regressor, the Anderson & Rubin (1949) test of ``beta = 0`` and its
  confidence set (robust to weak instruments; the set may be unbounded, and the ledger says so).

Conventions: every covariance uses the specification's kind with the same small-sample factors
as its estimate (``fegrid.covariance``); the F statistics are Wald statistics divided by the number
of excluded instruments, with the kind's df as denominator df.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from .errors import ConfigError
from .lazy import LazyModule
from .staggered import (
    EVENT_STUDY,
    GROUP_TIME,
    IMPUTATION,
    INTERACTION_WEIGHTED,
    STAGGERED_METHODS,
    StaggeredOptions,
    parse_options,
)

optimize = LazyModule("scipy.optimize")
special = LazyModule("scipy.special")

__all__ = [
    "METHODS",
    "LEAST_SQUARES",
    "TWO_STAGE",
    "POISSON",
    "Estimator",
    "parse_estimator",
    "FirstStage",
    "first_stage",
    "ArSet",
    "anderson_rubin",
    "kleibergen_paap_rk",
    "CURVE_LABELS",
]

LEAST_SQUARES = "least_squares"
TWO_STAGE = "two_stage_least_squares"
POISSON = "poisson_pml"
#: The methods of the estimator dimension (the staggered-adoption ones: :mod:`fegrid.staggered`).
METHODS: tuple[str, ...] = (LEAST_SQUARES, TWO_STAGE, POISSON, *STAGGERED_METHODS)

#: What a curve's estimates are, by method (the y-axis of its figure).
CURVE_LABELS: dict[str, str] = {
    LEAST_SQUARES: "least-squares coefficient",
    TWO_STAGE: "2SLS coefficient",
    POISSON: "Poisson PML coefficient (semi-elasticity)",
    EVENT_STUDY: "two-way event study: mean effect over periods 0 to the window's end",
    INTERACTION_WEIGHTED: "interaction-weighted average effect on the treated",
    IMPUTATION: "imputation average effect on the treated",
    GROUP_TIME: "group-time average effect on the treated",
}


@dataclass(frozen=True)
class Estimator:
    """How a specification is estimated.

    ``instruments`` are the excluded instruments of two-stage least squares; ``endogenous`` the
    endogenous regressors besides the focal one (which is always endogenous under 2SLS).
    ``curve`` names the specification curve the estimates belong to (default: the method), so that
    estimates that are not comparable are never drawn or tested on one curve unless the user says so.
    """

    method: str = LEAST_SQUARES
    instruments: tuple[str, ...] = ()
    endogenous: tuple[str, ...] = ()
    curve: str = ""
    staggered: StaggeredOptions | None = None  # the options of a staggered-adoption method

    def canonical(self) -> dict[str, object] | None:
        """Content for spec ids (``None`` for least squares: its ids predate the dimension)."""
        if self.method == LEAST_SQUARES:
            return None
        body: dict[str, object] = {"method": self.method}
        if self.method == TWO_STAGE:
            body["instruments"] = sorted(self.instruments)
            body["endogenous"] = sorted(self.endogenous)
        if self.staggered is not None:
            body.update(self.staggered.canonical())
        return body

    @property
    def curve_name(self) -> str:
        return self.curve or self.method

    def columns(self) -> tuple[str, ...]:
        return tuple(self.instruments) + tuple(self.endogenous)

    @property
    def staggered_method(self) -> bool:
        """Whether the method estimates the effect of a staggered adoption (the focal regressor must be
        the declared data.treatment)."""
        return self.method in STAGGERED_METHODS


_STAGGERED_KEYS = ("window", "reference", "controls_from", "uniform_band_draws")


def parse_estimator(name: str, body: dict[str, object]) -> Estimator:
    """An estimator choice of the config (already checked against the schema)."""
    method = str(body.get("method", LEAST_SQUARES))
    instruments = tuple(str(c) for c in body.get("instruments") or ())  # type: ignore[union-attr]
    endogenous = tuple(str(c) for c in body.get("also_endogenous") or ())  # type: ignore[union-attr]
    where = f"estimators.{name}"
    if method == TWO_STAGE:
        if not instruments:
            raise ConfigError(f"{where}: two-stage least squares needs at least one column in 'instruments'.")
        if len(instruments) < 1 + len(endogenous):
            raise ConfigError(
                f"{where}: {len(instruments)} instrument(s) for {1 + len(endogenous)} endogenous regressors "
                "(the focal regressor and also_endogenous); the model is under-identified.")
        if set(instruments) & set(endogenous):
            raise ConfigError(f"{where}: a column cannot be both an instrument and endogenous.")
    elif method in STAGGERED_METHODS:
        if instruments or endogenous:
            raise ConfigError(f"{where}: 'instruments' and 'also_endogenous' belong to method {TWO_STAGE} only.")
        options = parse_options(where, body, method)
        return Estimator(method, curve=str(body.get("curve") or ""), staggered=options)
    if method not in STAGGERED_METHODS and any(k in body for k in _STAGGERED_KEYS):
        raise ConfigError(f"{where}: {', '.join(k for k in _STAGGERED_KEYS if k in body)} belong to the "
                          f"staggered-adoption methods ({', '.join(STAGGERED_METHODS)}) only.")
    if method not in (TWO_STAGE, *STAGGERED_METHODS) and (instruments or endogenous):
        raise ConfigError(f"{where}: 'instruments' and 'also_endogenous' belong to method "
                          f"{TWO_STAGE} only (this choice has method {method}).")
    return Estimator(method, instruments, endogenous, str(body.get("curve") or ""))


# ---- instrumental-variable diagnostics -------------------------------------------------------------

#: The covariance, under the specification's kind, of the coefficients of ``p`` regressions on the
#: same regressors ``w`` (n, m) with residuals (n, p): ``(w, residuals) -> (matrix (p m, p m), df)``,
#: the coefficients stacked equation by equation.
CovarianceOf = Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, float]]


class FirstStage(NamedTuple):
    """First-stage diagnostics of the endogenous regressors (focal first)."""

    coefficients: np.ndarray  # (K, p): each endogenous regressor on the excluded instruments
    partial_r2: np.ndarray  # (p,)
    effective_f: float  # Montiel Olea & Pflueger (2013); NaN with several endogenous regressors
    kp_f: float  # Kleibergen & Paap (2006) rk Wald statistic / K
    df: float


def _sqrtm(a: np.ndarray) -> np.ndarray:
    val, vec = np.linalg.eigh((a + a.T) / 2)
    return (vec * np.sqrt(np.clip(val, 0, None))) @ vec.T


def _inv_sqrtm(a: np.ndarray) -> np.ndarray:
    val, vec = np.linalg.eigh((a + a.T) / 2)
    return (vec / np.sqrt(val)) @ vec.T


def kleibergen_paap_rk(pi: np.ndarray, v_pi: np.ndarray, zz: np.ndarray, vv: np.ndarray, n: int) -> float:
    """The rk statistic of Kleibergen & Paap (2006) for ``rank(pi) = p - 1``.

    ``pi`` (K, p) first-stage coefficients of the partialled-out endogenous regressors on the
    partialled-out instruments, ``v_pi`` the covariance of ``vec(pi)`` (column-major), ``zz`` the
    instruments' cross products and ``vv`` the first-stage residuals' cross products. The
    normalisation is ``Theta = G pi F`` with ``G = (Z'Z/n)^{1/2}`` and ``F = (V'V/n)^{-1/2}``.
    With homoskedastic ``v_pi`` this is the Cragg & Donald (1993) statistic (a test checks it).
    """
    k, p = pi.shape
    g = _sqrtm(zz / n)
    f = _inv_sqrtm(vv / n)
    theta = g @ pi @ f
    trans = np.kron(f, g)  # vec(G pi F) = (F' kron G) vec(pi), F symmetric
    v_theta = trans @ v_pi @ trans.T
    u, _, vt = np.linalg.svd(theta, full_matrices=True)
    vm = vt.T
    q = p - 1
    u22, v22 = u[q:, q:], vm[q:, q:]
    a_perp = u[:, q:] @ np.linalg.solve(u22, _sqrtm(u22 @ u22.T))
    b_perp = _sqrtm(v22 @ v22.T) @ np.linalg.solve(v22.T, vm[:, q:].T)
    lift = np.kron(b_perp, a_perp.T)
    lam = lift @ theta.flatten(order="F")
    omega = lift @ v_theta @ lift.T
    return float(lam @ np.linalg.solve(omega, lam))


def first_stage(w: np.ndarray, n_excluded: int, endog: np.ndarray, covariance: CovarianceOf) -> FirstStage:
    """First-stage diagnostics from the regressions of ``endog`` (n, p) on ``w`` (n, K + k):
    the excluded instruments first, then the exogenous controls (all partialled of the absorbed
    effects and scaled by the square root of the weights)."""
    n, p = endog.shape
    k = n_excluded
    ww = w.T @ w
    bread = np.linalg.inv(ww)
    coef = bread @ (w.T @ endog)  # (K+k, p)
    resid = endog - w @ coef
    # the instruments' cross products with the exogenous controls partialled out
    zz = ww[:k, :k] - ww[:k, k:] @ np.linalg.solve(ww[k:, k:], ww[k:, :k]) if w.shape[1] > k else ww[:k, :k]
    pi = coef[:k]
    explained = np.einsum("kp,kl,lp->p", pi, zz, pi)
    total = explained + np.einsum("np,np->p", resid, resid)
    partial_r2 = np.divide(explained, total, out=np.full(p, np.nan), where=total > 0)
    # covariance of the coefficients of the p equations jointly
    joint, df = covariance(w, resid)
    sel = np.concatenate([np.arange(k) + j * w.shape[1] for j in range(p)])
    v_pi = joint[np.ix_(sel, sel)]
    if p == 1:
        effective = float(pi[:, 0] @ zz @ pi[:, 0] / np.trace(zz @ v_pi))
        kp = float(pi[:, 0] @ np.linalg.solve(v_pi, pi[:, 0]))
    else:
        effective = float("nan")
        kp = kleibergen_paap_rk(pi, v_pi, zz, resid.T @ resid, n)
    return FirstStage(pi, partial_r2, effective, kp / k, df)


class ArSet(NamedTuple):
    """The Anderson-Rubin test of ``beta = 0`` and the confidence set of the focal coefficient."""

    p_value: float
    low: float  # the set's lowest point (-inf when unbounded below; NaN when empty)
    high: float
    description: str  # "[a, b]", "(-inf, a] U [b, inf)", "the whole line", "empty", ...


def _fmt(x: float) -> str:
    return "inf" if x == math.inf else "-inf" if x == -math.inf else f"{x:.6g}"


def _describe(intervals: list[tuple[float, float]]) -> str:
    if not intervals:
        return "empty"
    if len(intervals) == 1 and intervals[0] == (-math.inf, math.inf):
        return "the whole line"
    parts = [f"{'(' if a == -math.inf else '['}{_fmt(a)}, {_fmt(b)}{')' if b == math.inf else ']'}"
             for a, b in intervals]
    return " U ".join(parts)


def anderson_rubin(w: np.ndarray, n_excluded: int, y: np.ndarray, x: np.ndarray, covariance: CovarianceOf,
                   level: float) -> ArSet:
    """Anderson & Rubin (1949) test and confidence set for one endogenous regressor ``x``.

    For each ``b``, ``y - b x`` is regressed on ``w`` (excluded instruments first, then exogenous
    controls) and the excluded instruments' coefficients are tested jointly with the
    specification's covariance kind: ``AR(b) = d' V(b)^{-1} d / K`` against ``F(K, df)``. Every
    covariance kind's matrix is a quadratic function of ``b`` (the residuals are linear in it), so
    ``V(b)`` is found exactly from three evaluations; the set ``{b : AR(b) <= F_crit}`` is solved
    exactly for one instrument and scanned (with root refinement) for several.
    """
    k = n_excluded
    bread = np.linalg.inv(w.T @ w)
    a = bread @ (w.T @ y)
    c = bread @ (w.T @ x)
    ey, ex = y - w @ a, x - w @ c
    mats = {}
    df = float("nan")
    for b in (0.0, 1.0, -1.0):
        v, df = covariance(w, (ey - b * ex)[:, None])
        mats[b] = v[:k, :k]
    v0 = mats[0.0]
    v1 = (mats[1.0] - mats[-1.0]) / 2
    v2 = (mats[1.0] + mats[-1.0]) / 2 - v0
    az, cz = a[:k], c[:k]

    def stat(b: float) -> float:
        d = az - b * cz
        try:
            return float(d @ np.linalg.solve(v0 + b * v1 + b * b * v2, d)) / k
        except np.linalg.LinAlgError:
            return math.inf

    def stats(bs: np.ndarray) -> np.ndarray:
        """``stat`` at every point of ``bs`` in one batched solve (the same LAPACK call per point)."""
        d = az[None, :] - bs[:, None] * cz[None, :]
        mats = v0[None] + bs[:, None, None] * v1[None] + (bs * bs)[:, None, None] * v2[None]
        try:
            return np.einsum("pk,pk->p", d, np.linalg.solve(mats, d[:, :, None])[:, :, 0]) / k
        except np.linalg.LinAlgError:  # a singular point: each on its own, as ``stat`` treats it
            return np.array([stat(float(b)) for b in bs])

    p_value = float(special.fdtrc(k, df, stat(0.0))) if np.isfinite(df) and df > 0 else float("nan")
    crit = float(special.fdtri(k, df, level)) if np.isfinite(df) and df > 0 else float("nan")
    if not np.isfinite(crit):
        return ArSet(p_value, float("nan"), float("nan"), "not available (no df)")
    if k == 1:
        # (a - b c)^2 <= crit (v0 + b v1 + b^2 v2): a quadratic inequality in b
        qa = float(cz[0] ** 2 - crit * v2[0, 0])
        qb = float(-2 * az[0] * cz[0] - crit * v1[0, 0])
        qc = float(az[0] ** 2 - crit * v0[0, 0])
        intervals = _quadratic_set(qa, qb, qc)
    else:
        intervals = _scan_set(lambda b: stat(b) - crit, lambda bs: stats(bs) - crit)
    if not intervals:
        return ArSet(p_value, float("nan"), float("nan"), "empty")
    return ArSet(p_value, intervals[0][0], intervals[-1][1], _describe(intervals))


def _quadratic_set(qa: float, qb: float, qc: float) -> list[tuple[float, float]]:
    """``{b : qa b^2 + qb b + qc <= 0}`` as sorted intervals."""
    scale = max(abs(qa), abs(qb), abs(qc), 1e-300)
    if abs(qa) <= 1e-12 * scale:
        if abs(qb) <= 1e-12 * scale:
            return [(-math.inf, math.inf)] if qc <= 0 else []
        root = -qc / qb
        return [(-math.inf, root)] if qb > 0 else [(root, math.inf)]
    disc = qb * qb - 4 * qa * qc
    if disc < 0:
        return [] if qa > 0 else [(-math.inf, math.inf)]
    r = sorted(((-qb - math.sqrt(disc)) / (2 * qa), (-qb + math.sqrt(disc)) / (2 * qa)))
    return [(r[0], r[1])] if qa > 0 else [(-math.inf, r[0]), (r[1], math.inf)]


def _scan_set(g: Callable[[float], float], many: Callable[[np.ndarray], np.ndarray],
              points: int = 4001) -> list[tuple[float, float]]:
    """``{b : g(b) <= 0}`` on the whole line, scanned on ``b = tan(t)`` (``many`` evaluates ``g`` at
    every point at once) and refined by Brent's method."""
    t = np.linspace(-math.pi / 2, math.pi / 2, points)[1:-1]
    inside = many(np.tan(t)) <= 0
    intervals: list[tuple[float, float]] = []
    start = -math.inf if inside[0] else None
    for i in range(1, len(t)):
        if inside[i] == inside[i - 1]:
            continue
        edge = math.tan(optimize.brentq(lambda v: g(math.tan(v)), t[i - 1], t[i], xtol=1e-14))
        if inside[i]:
            start = edge
        else:
            intervals.append((start if start is not None else -math.inf, edge))
            start = None
    if start is not None:
        intervals.append((start, math.inf))
    return intervals
