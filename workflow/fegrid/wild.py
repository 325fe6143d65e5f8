"""Wild cluster restricted bootstrap (WCR) for the focal coefficient.

Cameron, Gelbach & Miller (2008): impose the null ``beta = beta0``, keep the restricted fitted
values and residuals, multiply each cluster's residuals by one random weight per draw, rebuild the
outcome, refit and compute the clustered t statistic; the p-value is the share of draws with
``|t*| >= |t|``. Weights: Rademacher (+1/-1) or Webb's six-point distribution (Webb 2023). When
``2^G`` is not larger than the requested draws, every Rademacher sign vector is enumerated.

The bootstrap runs in the demeaned space (the absorbed effects are partialled out first, as the
engine does), and the refit is never carried out row by row: with ``u`` the restricted residuals,
``h = X B e_1`` and ``B = (X'X)^{-1}``, a draw ``v`` (one weight per cluster) gives

    beta* - beta0 = sum_g v_g c_g,                      c_g = sum_{i in g} h_i u_i,
    s*_g = v_g c_g - H_g' B sum_g' v_g' Q_g',           H_g = sum_{i in g} h_i x_i,  Q_g = X_g' u_g,

and the clustered variance of the draw is ``factor * sum_g s*_g^2`` — so all draws together cost
one ``(draws x G) @ (G x k)`` product (the fast algorithm of Roodman, MacKinnon, Nielsen & Webb
2019). Everything is linear in ``beta0``, so the confidence interval by test inversion is a
root search over cheap evaluations.

Absorbed effects that cross clusters. A draw's outcome in levels is the restricted fit plus
``sum_g v_g u_g`` (``u_g``: the restricted residuals of cluster ``g``, zero elsewhere). Refitting
the model with its absorbed effects demeans that outcome again, and ``M u_g`` (``M`` the residual
maker of the absorbed effects) equals ``u_g`` only when every absorbed effect is nested in the
clusters. Otherwise the draw's residuals in cluster ``g'`` carry pieces of every other cluster:

    s*_g' = sum_g v_g C_g'g - H_g' B sum_g v_g Q_g,       C_g'g = sum_{i in g'} h_i (M u_g)_i,

and since ``M`` is symmetric and ``h`` lies in its range, ``C_g'g = sum_{i in g} (M h_g')_i u_i``:
the ``G`` per-cluster pieces of ``h`` are demeaned once per specification (not once per draw),
and ``C`` is diagonal (``c_g``) when the effects are nested. The coefficient of a draw is the same
either way (``X'M = X'`` for demeaned ``X``); only its clustered standard error changes.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from .defaults import DEFAULTS
from .errors import EstimationError
from .lazy import LazyModule

sp = LazyModule("scipy.sparse")

__all__ = ["WildBootstrap", "WEIGHT_KINDS", "wild_weights", "WildOutcome", "wild_cluster_test"]

_WEBB = np.array([-np.sqrt(1.5), -1.0, -np.sqrt(0.5), np.sqrt(0.5), 1.0, np.sqrt(1.5)])

#: Weight distributions of the wild bootstrap.
WEIGHT_KINDS = ("rademacher", "webb")


@dataclass(frozen=True)
class WildBootstrap:
    """Settings of the wild cluster restricted bootstrap of one clustering choice."""

    draws: int = DEFAULTS["wild_bootstrap.draws"]
    weights: str = DEFAULTS["wild_bootstrap.weights"]
    seed: int = DEFAULTS["wild_bootstrap.seed"]
    interval: bool = DEFAULTS["wild_bootstrap.interval"]

    def __post_init__(self) -> None:
        if self.weights not in WEIGHT_KINDS:
            raise EstimationError(f"unknown bootstrap weights '{self.weights}'; the kinds are "
                                  f"{', '.join(WEIGHT_KINDS)}.")
        if self.draws < 1:
            raise EstimationError("the wild bootstrap needs at least one draw.")


def wild_weights(settings: WildBootstrap, n_clusters: int, key: str) -> tuple[np.ndarray, bool]:
    """The (draws x G) weight matrix and whether it enumerates every Rademacher sign vector.

    The generator is seeded with the settings' seed and ``key`` (the specification's id), so the
    draws are the same whichever job or process computes them.
    """
    if settings.weights == "rademacher" and 2**n_clusters <= settings.draws:
        codes = np.arange(2**n_clusters)[:, None] >> np.arange(n_clusters)[None, :] & 1
        return np.where(codes == 1, 1.0, -1.0), True
    digest = int(hashlib.sha256(key.encode()).hexdigest()[:12], 16)
    rng = np.random.default_rng([settings.seed, digest])
    if settings.weights == "rademacher":
        return rng.choice(np.array([-1.0, 1.0]), size=(settings.draws, n_clusters)), False
    return rng.choice(_WEBB, size=(settings.draws, n_clusters)), False


@dataclass(frozen=True)
class WildOutcome:
    p_value: float
    ci_low: float
    ci_high: float
    draws: int
    enumerated: bool


def _group_sums(values: np.ndarray, codes: np.ndarray, n_groups: int) -> np.ndarray:
    if values.ndim == 1:
        return np.bincount(codes, values, minlength=n_groups)
    return np.column_stack([np.bincount(codes, values[:, j], minlength=n_groups) for j in range(values.shape[1])])


#: Residual maker of the absorbed effects on columns of the (weight-scaled) demeaned space.
PartialOut = Callable[[np.ndarray], np.ndarray]

# cluster pieces of h are demeaned in chunks of at most this many matrix elements (about 32 MB)
_CHUNK_ELEMENTS = 4_000_000


def _cross_cluster_sums(h: np.ndarray, u: tuple[np.ndarray, ...], codes: np.ndarray, n_groups: int,
                        partial_out: PartialOut) -> tuple[np.ndarray, ...]:
    """``C[g', g] = sum_{i in g} (M h_g')_i u_i`` for each vector in ``u`` (see the module notes)."""
    n = len(h)
    indicator = sp.csr_array((np.ones(n), (codes, np.arange(n))), shape=(n_groups, n))
    out = [np.empty((n_groups, n_groups)) for _ in u]
    width = max(1, _CHUNK_ELEMENTS // max(n, 1))
    for start in range(0, n_groups, width):
        stop = min(n_groups, start + width)
        pieces = np.zeros((n, stop - start), order="F")
        rows = (codes >= start) & (codes < stop)
        pieces[np.flatnonzero(rows), codes[rows] - start] = h[rows]
        demeaned = partial_out(pieces)
        for target, vec in zip(out, u):
            target[start:stop, :] = (indicator @ (demeaned * vec[:, None])).T
    return tuple(out)


def wild_cluster_test(*, y: np.ndarray, x: np.ndarray, bread: np.ndarray, codes: np.ndarray, factor: float,
                      estimate: float, std_error: float, settings: WildBootstrap, key: str,
                      level: float, partial_out: PartialOut | None = None) -> WildOutcome:
    """WCR p-value of ``beta = 0`` for the first column of ``x``, and the interval by inversion.

    Parameters
    ----------
    y, x
        Demeaned (and weight-scaled) outcome and regressors, focal first.
    bread
        ``(X'X)^{-1}``.
    codes
        Cluster codes ``0..G-1`` of the rows.
    factor
        The small-sample factor of the clustered variance, ``G/(G-1) (N-1)/(N-K)``; the same in
        the observed and the bootstrap t statistics.
    estimate, std_error
        The observed coefficient and its clustered standard error.
    partial_out
        The residual maker of the absorbed effects in the same (weight-scaled) space, or ``None``
        when every absorbed effect is nested in the clusters (then ``M u_g = u_g``).
    """
    n_groups = int(codes.max()) + 1
    controls = x[:, 1:]
    h = x @ bread[:, 0]
    if controls.shape[1]:
        gamma_y = np.linalg.lstsq(controls, y, rcond=None)[0]
        gamma_x = np.linalg.lstsq(controls, x[:, 0], rcond=None)[0]
        u0 = y - controls @ gamma_y  # restricted residuals under beta0 = 0
        mx = x[:, 0] - controls @ gamma_x  # how they move with beta0: u(b0) = u0 - b0 mx
    else:
        u0, mx = y.copy(), x[:, 0].copy()
    hx = _group_sums(h[:, None] * x, codes, n_groups)  # H_g, (G, k)
    c0, c1 = _group_sums(h * u0, codes, n_groups), _group_sums(h * mx, codes, n_groups)
    q0, q1 = _group_sums(x * u0[:, None], codes, n_groups), _group_sums(x * mx[:, None], codes, n_groups)
    weights, enumerated = wild_weights(settings, n_groups, key)
    proj = bread @ hx.T  # (k, G)
    vq0, vq1 = weights @ q0, weights @ q1  # (draws, k)
    # parts of the draws that do not depend on beta0 and those proportional to it
    num0, num1 = weights @ c0, weights @ c1
    if partial_out is None:
        s0 = weights * c0[None, :] - vq0 @ proj
        s1 = weights * c1[None, :] - vq1 @ proj
    else:
        cross0, cross1 = _cross_cluster_sums(h, (u0, mx), codes, n_groups, partial_out)
        s0 = weights @ cross0.T - vq0 @ proj
        s1 = weights @ cross1.T - vq1 @ proj

    def p_value(beta0: float) -> float:
        num = num0 - beta0 * num1
        s = s0 - beta0 * s1
        se = np.sqrt(factor * np.einsum("ij,ij->i", s, s))
        with np.errstate(divide="ignore", invalid="ignore"):
            t_star = np.where(se > 0, num / se, 0.0)
        t_obs = (estimate - beta0) / std_error
        # ties (the draw of all ones reproduces the data) are counted despite rounding and the
        # demeaning tolerance
        return float(np.mean(np.abs(t_star) >= abs(t_obs) - 1e-8 * max(1.0, abs(t_obs))))

    p = p_value(0.0)
    low = high = float("nan")
    if settings.interval and np.isfinite(std_error) and std_error > 0:
        alpha = 1.0 - level
        low = _invert(p_value, estimate, -std_error, alpha)
        high = _invert(p_value, estimate, std_error, alpha)
    return WildOutcome(p, low, high, len(weights), enumerated)


def _invert(p_value, estimate: float, step: float, alpha: float) -> float:
    """The beta0 on one side of the estimate where the bootstrap p-value falls to ``alpha``."""
    inside, outside = estimate, estimate + step
    for _ in range(60):  # widen until rejected
        if p_value(outside) <= alpha:
            break
        inside, outside = outside, outside + 2 * (outside - estimate)
    else:
        return float("nan")
    for _ in range(60):  # bisect to a relative precision far below the SE
        mid = (inside + outside) / 2
        if p_value(mid) > alpha:
            inside = mid
        else:
            outside = mid
        if abs(outside - inside) <= 1e-6 * abs(step):
            break
    return (inside + outside) / 2
