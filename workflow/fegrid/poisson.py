"""Poisson pseudo-maximum likelihood with absorbed effects (Santos Silva & Tenreyro 2006).

The model ``E[y | x, effects] = exp(x'b + effects)`` is fitted by iteratively reweighted least
squares: each step regresses the working variable ``z = eta + (y - mu) / mu`` on the regressors
with weights ``mu`` (times any user weights), absorbing the effects by weighted alternating
projections (Frisch-Waugh-Lovell in the weighted inner product). Each step starts its demeaning
from the previous step's solution: the absorbed part of a column lies in the span of the effects,
so subtracting it leaves the residual unchanged and leaves less to iterate.

Before fitting, observations whose conditional mean is zero at the optimum are removed, as the
estimate does not exist (or its effects diverge) with them:

* effect groups whose outcome is zero throughout (a unit that never records a count), repeated
  with singletons until nothing changes;
* observations separated by the regressors: zeros that a linear combination of the regressors
  and effects can push to minus infinity without touching the positive outcomes. When the
  regressors and effects have the same rank on the positive outcomes as on all rows, no such
  combination exists (checked first, cheaply); otherwise they are found by the iterated rectifier
  of Correia, Guimarães & Zylkin (2021): regress ``u`` (1 for zeros) on the regressors and
  effects with a prohibitive weight on the positive outcomes, replace ``u`` by the positive part
  of the fit, repeat; when the fit is non-negative on the zeros and zero on the positive
  outcomes, the zeros with a positive fit are separated.

Both counts land in the ledger (``n_separated``), like singletons.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import NamedTuple

import numpy as np
import pandas as pd

from .absorb import Absorber, CodesOf, LevelCodes, Term, codes_on_rows, drop_singletons, float_columns

__all__ = ["separated_rows", "zero_group_rows", "positives_span_everything", "PoissonFit", "irls"]

#: The weight that pins the positive outcomes in the rectifier's regressions.
_PIN = 1e8


def zero_group_rows(y: np.ndarray, terms: Sequence[Term], codes_of: CodesOf) -> np.ndarray:
    """Rows whose group, in some absorbed term, has an outcome of zero throughout (``codes_of`` gives the
    terms' codes on the rows of ``y``)."""
    out = np.zeros(len(y), dtype=bool)
    for term in terms:
        codes = codes_of(term.groups)
        totals = np.bincount(codes, y, minlength=int(codes.max()) + 1 if len(codes) else 0)
        out |= totals[codes] <= 0
    return out


def separated_rows(frame: pd.DataFrame, y: np.ndarray, regressors: Sequence[str], terms: Sequence[Term], *,
                   time: str | None, keep_singletons: bool, tolerance: float,
                   max_iterations: int, codes_of: CodesOf | None = None) -> np.ndarray:
    """A mask of the rows to keep: neither in an all-zero effect group nor separated by the regressors.
    ``codes_of`` gives the terms' codes on ``frame`` (by default factorized from it)."""
    keep = np.ones(len(frame), dtype=bool)
    if len(frame) == 0:
        return keep
    codes_of = codes_of or LevelCodes(frame)
    while True:  # all-zero groups, then the singletons their removal leaves, until nothing changes
        idx = np.flatnonzero(keep)
        sub = frame.iloc[idx]
        on_sub = codes_on_rows(codes_of, idx)
        drop = zero_group_rows(y[idx], terms, on_sub) if terms else np.zeros(len(idx), dtype=bool)
        if terms and not keep_singletons:
            drop |= ~drop_singletons(sub, terms, codes_of=on_sub) if (~drop).all() else np.zeros(len(idx), dtype=bool)
        if not drop.any():
            break
        keep[idx[drop]] = False
        if not keep.any():
            return keep
    # the loop ended on the rows kept: idx, sub and their codes are theirs
    zeros = y[idx] == 0
    if not zeros.any() or not regressors:
        return keep
    x = float_columns(sub, regressors)
    time_values = sub[time].to_numpy(dtype=float) if time and time in sub else None
    if positives_span_everything(zeros, x, terms, time=time, time_values=time_values, tolerance=tolerance,
                                 max_iterations=max_iterations, codes_of=on_sub):
        return keep
    w = np.where(zeros, 1.0, _PIN)
    absorber = Absorber(sub, terms, weights=w, time=time, tolerance=min(tolerance, 1e-12),
                        max_iterations=max_iterations, codes_of=on_sub)
    xt = absorber.demean(x).values
    sw = np.sqrt(w)[:, None]
    q, r = np.linalg.qr(xt * sw)
    keep_cols = np.abs(np.diag(r)) > 1e-9 * max(float(np.abs(np.diag(r)).max()), 1e-300)
    q = q[:, keep_cols]
    u = zeros.astype(float)
    for _ in range(100):
        ut = absorber.demean(u).values[:, 0]
        fitted_part = q @ (q.T @ (ut * sw[:, 0])) / sw[:, 0]
        fit = u - ut + fitted_part  # the effects' part plus the regressors' part of the fit
        fit[np.abs(fit) < 1e-6] = 0.0
        if (fit[zeros] >= 0).all() and (fit[~zeros] == 0).all():
            # a certificate: a combination of regressors and effects that is zero on every positive
            # outcome and non-negative on the zeros; the zeros where it is positive are separated
            keep[idx[zeros & (fit > 0)]] = False
            return keep
        u = np.where(zeros, np.clip(fit, 0, None), 0.0)
    return keep  # no verdict in 100 steps: nothing is dropped (the fit's convergence says the rest)


def positives_span_everything(zeros: np.ndarray, x: np.ndarray, terms: Sequence[Term], *, time: str | None,
                              time_values: np.ndarray | None, tolerance: float, max_iterations: int,
                              codes_of: CodesOf) -> bool:
    """A sufficient condition for no separation, cheap to check: the regressors and effects have
    the same rank on the positive outcomes as on all rows. A separating combination vanishes on the
    positives and not on some zero, so it cannot exist then. Exact for at most two categorical
    terms (their rank is counted exactly); otherwise ``False`` (the rectifier decides). ``zeros``
    marks the rows with a zero outcome, ``x`` holds the regressors, ``codes_of`` the terms' codes and
    ``time_values`` the time column on the same rows."""
    if len(terms) > 2:
        return False
    positive = np.flatnonzero(~zeros)
    if len(positive) <= x.shape[1]:
        return False
    everything = Absorber(len(zeros), terms, time=time, time_values=time_values, codes_of=codes_of)
    positives = Absorber(len(positive), terms, time=time,
                         time_values=None if time_values is None else time_values[positive],
                         tolerance=tolerance, max_iterations=max_iterations,
                         codes_of=codes_on_rows(codes_of, positive), direct_at_once=True)
    if positives.absorbed_df != everything.absorbed_df:
        return False
    xp = positives.demean(x[~zeros]).values
    if not x.shape[1]:
        return True
    r = np.linalg.qr(xp, mode="r")
    scale = np.linalg.norm(x[~zeros] - x[~zeros].mean(axis=0), axis=0).max()
    return bool(np.abs(np.diag(r)).min() > 1e-8 * max(scale, 1e-300))


class PoissonFit(NamedTuple):
    """The fitted Poisson PML model on its rows."""

    coefficients: np.ndarray
    mu: np.ndarray
    demeaned: np.ndarray  # (n, k) regressors demeaned with the final weights
    absorber: Absorber
    iterations: int
    converged: bool
    deviance: float


def _deviance(y: np.ndarray, mu: np.ndarray, w: np.ndarray) -> float:
    with np.errstate(divide="ignore", invalid="ignore"):
        term = np.where(y > 0, y * np.log(y / mu), 0.0) - (y - mu)
    return float(2 * np.dot(w, term))


def irls(frame: pd.DataFrame | int, y: np.ndarray, x: np.ndarray, terms: Sequence[Term], *,
         weights: np.ndarray | None, time: str | None, tolerance: float, max_iterations: int, codes_of: CodesOf,
         max_steps: int = 200, time_values: np.ndarray | None = None, start: np.ndarray | None = None,
         absorber: Absorber | None = None) -> PoissonFit:
    """Poisson PML of ``y`` on ``x`` (n, k) with the absorbed ``terms`` (see the module docstring); ``frame``
    and ``time_values`` as for :class:`fegrid.absorb.Absorber`. ``absorber``, when given, is one already
    built on the same rows and terms (any weights): its steps are its reweightings, which keep what it
    computed once (the codes, the direct solver's layout).

    Converged when the deviance changes by less than ``1e-10`` relatively (Correia, Guimarães &
    Zylkin 2020 use ``1e-8``); the demeaning of each step is held to ``tolerance``. The iterations start
    from the means ``(y + mean(y)) / 2``, or from the linear predictor ``start`` (a fit of nearby data).
    """
    w_user = np.ones(len(y)) if weights is None else weights
    if start is None:
        mu = (y + np.average(y, weights=w_user)) / 2
        eta = np.log(mu)
    else:
        eta = np.array(start, dtype=float)
        mu = np.exp(eta)
    # the starting means are not of the model's form, so their deviance is no benchmark: the
    # first step is taken whole, and step halving guards the later ones
    dev_old = np.inf
    absorbed = np.zeros((len(y), x.shape[1] + 1))
    beta = np.zeros(x.shape[1])
    converged = False
    steps = 0
    xt = x
    omega = w_user * mu
    absorber = (absorber.reweighted(omega) if absorber is not None else
                Absorber(frame, terms, weights=omega, time=time, tolerance=tolerance,
                         max_iterations=max_iterations, codes_of=codes_of, time_values=time_values))
    while steps < max_steps:
        steps += 1
        z = eta + (y - mu) / mu
        if steps > 1:  # the weights of this step's means
            omega = w_user * mu
            absorber = absorber.reweighted(omega)
        start = np.column_stack([z, x]) - absorbed
        tilde = absorber.demean(start, warm=True).values
        absorbed = np.column_stack([z, x]) - tilde
        zt, xt = tilde[:, 0], tilde[:, 1:]
        sw = np.sqrt(omega)
        beta_new = np.linalg.lstsq(xt * sw[:, None], zt * sw, rcond=None)[0] if x.shape[1] else beta
        eta_new = z - (zt - xt @ beta_new)
        mu_new = np.exp(np.clip(eta_new, -700, 700))
        dev = _deviance(y, mu_new, w_user)
        halvings = 0
        while dev > dev_old * (1 + 1e-12) + 1e-12 and halvings < 30:  # step halving keeps the deviance falling
            eta_new = (eta_new + eta) / 2
            beta_new = (beta_new + beta) / 2
            mu_new = np.exp(np.clip(eta_new, -700, 700))
            dev = _deviance(y, mu_new, w_user)
            halvings += 1
        change = abs(dev - dev_old) / max(abs(dev), 0.1) if np.isfinite(dev_old) else np.inf
        eta, mu, beta, dev_old = eta_new, mu_new, beta_new, dev
        if change < 1e-10:
            converged = True
            break
    # the regressors demeaned with the final weights (the scores' and bread's weights)
    absorber = absorber.reweighted(w_user * mu)
    xt = absorber.demean(xt, warm=True).values if x.shape[1] else xt
    return PoissonFit(beta, mu, xt, absorber, steps, converged, dev_old)
