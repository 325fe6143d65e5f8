"""Absorbed effects: parsing, singleton removal, degrees of freedom and demeaning.

A choice of absorbed effects is a tuple of *terms*. Two kinds of term exist, held in the registry
:data:`ABSORB_KINDS`:

``effect``
    a categorical fixed effect on one column or on the interaction of several columns
    (written ``"valley x season"`` in the config);
``trend``
    a unit-specific linear trend: an intercept and a slope on the panel's time variable for every
    level of one column (written ``{trend: orchard}``).

Terms are compiled on a fixed set of rows into projections; their joint residual maker is computed
by alternating projections (Gaure 2013) with the line-search acceleration of Gearhart & Koshy
(1989). One term alone is projected out exactly in one sweep. When two terms are left and the
smaller is a categorical effect with few levels in each connected part of the two (unit and period
effects, the commonest case, or unit and region-by-period effects), the iterations jump to the
direct solution: the large term's residuals, less their projection on the small term's dummies made
orthogonal to the large term (Frisch-Waugh-Lovell), from small dense systems; the terms' group sums
confirm the tolerance (a bound on what one more sweep could change), or failing them one more sweep.
One dense system jumps at once, many parts after ten sweeps (at once in the steps of an iteratively
reweighted fit, which build their layout once; a column that starts warm there is first checked by its
group sums, which may confirm it as it is).
"""

from __future__ import annotations

import copy
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import pandas as pd

from .defaults import DEFAULTS
from .errors import ConfigError
from .lazy import LazyModule

sp = LazyModule("scipy.sparse")
csgraph = LazyModule("scipy.sparse.csgraph")

__all__ = [
    "ABSORB_KINDS",
    "EffectTerm",
    "TrendTerm",
    "Term",
    "parse_term",
    "parse_absorb",
    "term_label",
    "factorize",
    "float_columns",
    "drop_singletons",
    "LevelCodes",
    "codes_on_rows",
    "Absorber",
    "DemeanOutcome",
]

_INTERACTION = re.compile(r"\s+x\s+")
#: other languages' interaction operators: fegrid writes interactions one way only, 'a x b'
_FOREIGN_OPERATOR = re.compile(r"\w\s*(\*|#|:)\s*\w")


@dataclass(frozen=True)
class EffectTerm:
    """A categorical fixed effect on one column or the interaction of several columns."""

    columns: tuple[str, ...]
    kind: str = field(default="effect", init=False)
    #: Whether the term adds a slope per group (and so may never be dropped as redundant).
    has_slope = False

    @classmethod
    def parse(cls, value: object, *, where: str) -> EffectTerm:
        """``{effect: column}`` or ``{effect: [columns]}``."""
        cols = (value,) if isinstance(value, str) else tuple(value) if isinstance(value, (list, tuple)) else ()
        if not cols or not all(isinstance(c, str) for c in cols):
            raise ConfigError(f"{where}: 'effect' takes a column name or a list of them.")
        return cls(cols)

    def canonical(self) -> dict[str, object]:
        return {"kind": self.kind, "columns": list(self.columns)}

    def label(self) -> str:
        return " x ".join(self.columns)

    @property
    def groups(self) -> tuple[str, ...]:
        """The columns whose levels (or level combinations) are the term's groups."""
        return self.columns

    def needed_columns(self, time: str | None) -> tuple[str, ...]:
        return self.columns


@dataclass(frozen=True)
class TrendTerm:
    """An intercept and a linear slope in the panel's time variable for each level of ``group``."""

    group: str
    kind: str = field(default="trend", init=False)
    has_slope = True

    @classmethod
    def parse(cls, value: object, *, where: str) -> TrendTerm:
        """``{trend: column}``."""
        if not isinstance(value, str):
            raise ConfigError(f"{where}: 'trend' takes one column name, got {value!r}.")
        return cls(value)

    def canonical(self) -> dict[str, object]:
        return {"kind": self.kind, "group": self.group}

    def label(self) -> str:
        return f"trend({self.group})"

    @property
    def groups(self) -> tuple[str, ...]:
        return (self.group,)

    def needed_columns(self, time: str | None) -> tuple[str, ...]:
        if time is None:
            raise ConfigError(
                f"The absorbed trend of '{self.group}' needs the panel's time column: set "
                "data.time in the config."
            )
        return (self.group, time)


Term = EffectTerm | TrendTerm

#: Registry of absorbed-effect kinds: the config's spelling -> term class. Each class parses its own
#: config value, labels itself, names its columns and gives its canonical form.
ABSORB_KINDS: dict[str, type[EffectTerm] | type[TrendTerm]] = {"effect": EffectTerm, "trend": TrendTerm}


def parse_term(raw: object, *, where: str = "absorb") -> Term:
    """Parse one term of an absorbed-effects choice.

    Parameters
    ----------
    raw
        ``"orchard"``, ``"valley x season"`` (interaction), or a mapping with exactly one key naming
        a kind of :data:`ABSORB_KINDS` (``{"trend": "orchard"}``, ``{"effect": ["valley", "season"]}``).
    where
        The config key being parsed, named in errors.

    Examples
    --------
    >>> parse_term("valley x season")
    EffectTerm(columns=('valley', 'season'), kind='effect')
    >>> parse_term({"trend": "orchard"})
    TrendTerm(group='orchard', kind='trend')
    """
    if isinstance(raw, str):
        parts = tuple(p.strip() for p in _INTERACTION.split(raw.strip()) if p.strip())
        if not parts:
            raise ConfigError(f"{where}: an absorbed term is an empty string.")
        if (foreign := _FOREIGN_OPERATOR.search(raw)) is not None:
            suggestion = " x ".join(p.strip() for p in re.split(r"\s*[*#:]\s*", raw.strip()))
            raise ConfigError(f"{where}: '{raw}' uses '{foreign.group(1)}'; fegrid writes an interaction only as "
                              f"'a x b' (here '{suggestion}'). A column whose name holds '*', '#' or ':' cannot "
                              "be absorbed; rename it.")
        return EffectTerm(parts)
    if isinstance(raw, Mapping) and len(raw) == 1:
        kind, value = next(iter(raw.items()))
        if kind not in ABSORB_KINDS:
            raise ConfigError(
                f"{where}: unknown kind of absorbed term '{kind}'; the kinds are "
                f"{', '.join(sorted(ABSORB_KINDS))}."
            )
        return ABSORB_KINDS[kind].parse(value, where=where)
    raise ConfigError(
        f"{where}: an absorbed term is a column name, 'a x b' for an interaction, or a mapping "
        f"such as {{trend: unit_column}}; got {raw!r}."
    )


def parse_absorb(raw: Sequence[object] | None, *, where: str = "absorb") -> tuple[Term, ...]:
    """Parse a list of terms; duplicates are removed, the order is kept."""
    terms: list[Term] = []
    for item in raw or []:
        term = parse_term(item, where=where)
        if term not in terms:
            terms.append(term)
    return tuple(terms)


def term_label(term: Term) -> str:
    """Short human label: ``valley x season`` or ``trend(orchard)``."""
    return term.label()


def factorize(frame: pd.DataFrame, columns: Sequence[str]) -> tuple[np.ndarray, int]:
    """Integer codes ``0..L-1`` for the levels (or level combinations) of ``columns``.

    Codes follow the sorted order of the levels, so they do not depend on row order.
    """
    if len(columns) == 1:
        codes = _column_codes(frame[columns[0]])[0]
        return codes, int(codes.max()) + 1 if len(codes) else 0
    return _combined([_column_codes(frame[col]) for col in columns], len(frame))


def _column_codes(series: pd.Series) -> tuple[np.ndarray, int]:
    """One column's codes in the sorted order of its levels, and its number of levels."""
    plain_integers = isinstance(series.dtype, np.dtype) and series.dtype.kind in "iu"  # not nullable Int64
    got = _integer_codes(series.to_numpy()) if plain_integers else None
    return got if got is not None else _sorted_factorize(series)


def _combined(parts: Sequence[tuple[np.ndarray, int]], n: int) -> tuple[np.ndarray, int]:
    """The codes of the level combinations of columns, from each column's codes and number of levels
    (:func:`_column_codes`), in sorted order."""
    codes = np.zeros(n, dtype=np.int64)
    for c, n_levels in parts:
        codes = codes * max(n_levels, 1) + c
    got = _integer_codes(codes)
    return got if got is not None else _sorted_factorize(pd.Series(codes))


def float_columns(frame: pd.DataFrame, columns: Sequence[str]) -> np.ndarray:
    """The columns as one float matrix (n, k), column by column: the same values as
    ``frame[columns].to_numpy(dtype=float)`` without building a frame of the selection."""
    out = np.empty((len(frame), len(columns)), order="F")
    for j, col in enumerate(columns):
        out[:, j] = frame[col].to_numpy(dtype=float)
    return out


def _sorted_factorize(series: pd.Series) -> tuple[np.ndarray, int]:
    c, uniques = pd.factorize(series, sort=True)
    return c.astype(np.int64, copy=False), len(uniques)


def _integer_codes(values: np.ndarray) -> tuple[np.ndarray, int] | None:
    """Codes of integers in sorted order by counting (no sort), when their range is at most a few
    times their number; ``None`` otherwise."""
    if len(values) == 0:
        return None
    low, high = int(values.min()), int(values.max())
    if high - low > 4 * len(values) + 1024:
        return None
    if values.dtype.kind == "i":
        shifted = values.astype(np.int64, copy=False)
        shifted = shifted - low if low else shifted  # codes already from zero (the usual ids): no copy
    else:  # unsigned: subtract in its own type (never below zero), then count in int64
        shifted = (values - values.dtype.type(low)).astype(np.int64, copy=False)
    present = np.zeros(high - low + 1, dtype=bool)
    present[shifted] = True
    rank = np.cumsum(present, dtype=np.int64) - 1
    return rank[shifted], int(rank[-1]) + 1


CodesOf = Callable[[tuple[str, ...]], np.ndarray]


class LevelCodes:
    """Integer codes of columns (or column combinations) of one frame, each computed once.

    :meth:`on_rows` gives the codes of a subset of the rows, renumbered ``0..L-1`` in the same
    sorted order, without factorizing again: the block's sample is factorized once and every design
    (complete-case rows less singletons) reuses it.
    """

    def __init__(self, frame: pd.DataFrame) -> None:
        self.frame = frame
        self._codes: dict[tuple[str, ...], np.ndarray] = {}
        self._levels: dict[str, int] = {}

    def __call__(self, columns: tuple[str, ...]) -> np.ndarray:
        if columns not in self._codes:
            if len(columns) == 1:
                self._codes[columns], self._levels[columns[0]] = factorize(self.frame, columns)
            else:  # combined from each column's codes, factorized once for every combination they enter
                self._codes[columns] = _combined([(self((col,)), self._levels[col]) for col in columns],
                                                 len(self.frame))[0]
        return self._codes[columns]

    def on_rows(self, positions: np.ndarray) -> CodesOf:
        """The codes on the rows at ``positions`` (increasing, as ``np.flatnonzero`` gives them); the
        frame's own codes when they are every row."""
        n = len(self.frame)
        if len(positions) == n and (n == 0 or (positions[0] == 0 and positions[-1] == n - 1)):
            return self  # n increasing positions from 0 to n - 1: every row, in order
        return codes_on_rows(self, positions)


def codes_on_rows(codes_of: CodesOf, positions: np.ndarray) -> CodesOf:
    """The codes of ``codes_of`` on a subset of its rows, renumbered ``0..L-1`` in the same sorted order
    (the codes a factorization of the subset gives), each computed when first asked."""
    cache: dict[tuple[str, ...], np.ndarray] = {}

    def on_rows(columns: tuple[str, ...]) -> np.ndarray:
        if columns not in cache:
            cache[columns] = _densify(codes_of(columns)[positions])
        return cache[columns]

    return on_rows


def _densify(codes: np.ndarray) -> np.ndarray:
    """Renumber codes to ``0..L-1`` keeping their order."""
    if len(codes) == 0:
        return codes
    present = np.zeros(int(codes.max()) + 1, dtype=bool)
    present[codes] = True
    return (np.cumsum(present) - 1)[codes]


def _default_codes(frame: pd.DataFrame) -> CodesOf:
    return lambda columns: factorize(frame, columns)[0]


def drop_singletons(frame: pd.DataFrame, terms: Sequence[Term], *, codes_of: CodesOf | None = None) -> np.ndarray:
    """Boolean mask of rows kept after removing singletons iteratively.

    A singleton is an observation alone in a group of some absorbed term. Removing one can create
    another in a different term, so the removal repeats until no term has a group of size one
    (Correia 2015).
    """
    keep = np.ones(len(frame), dtype=bool)
    if not terms:
        return keep
    codes_of = codes_of or _default_codes(frame)
    codes = [codes_of(t.groups) for t in terms]
    while True:
        changed = False
        for c in codes:
            counts = np.bincount(c[keep], minlength=int(c.max()) + 1 if len(c) else 0)
            lonely = keep & (counts[c] == 1)
            if lonely.any():
                keep &= ~lonely
                changed = True
        if not changed:
            return keep


@dataclass(frozen=True)
class DemeanOutcome:
    """Demeaned columns with the iteration count and convergence flag of each."""

    values: np.ndarray  # (n, k), Fortran order
    iterations: np.ndarray  # (k,)
    converged: np.ndarray  # (k,) bool
    centred_norms: np.ndarray | None = None  # (k,) each column's weighted norm once centred, before projecting


class _Projection:
    """Residual maker of one term on fixed rows, in the inner product weighted by ``w``."""

    def __init__(self, codes: np.ndarray, n_groups: int, w: np.ndarray, slope: np.ndarray | None):
        self.codes = codes
        self.w = w
        self.unweighted = bool(np.all(w == 1.0))
        wsum = np.bincount(codes, w, minlength=n_groups)  # weighted group sizes
        self.inv_wsum = np.divide(1.0, wsum, out=np.zeros_like(wsum), where=wsum > 0)
        self.slope = None
        if slope is not None:
            tbar = np.bincount(codes, w * slope, minlength=n_groups) * self.inv_wsum
            tc = slope - tbar[codes]
            ss = np.bincount(codes, w * (tc * tc), minlength=n_groups)
            # groups where time does not vary get no slope: the intercept alone is projected out
            self.inv_ss = np.divide(1.0, ss, out=np.zeros_like(ss), where=ss > 1e-12 * (1 + ss.max()))
            self.slope = tc

    def _group_sums(self, v: np.ndarray) -> np.ndarray:
        return np.bincount(self.codes, v if self.unweighted else v * self.w, minlength=len(self.inv_wsum))

    def apply(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Residuals of the columns of ``x`` (Fortran order), in ``out`` (which may be ``x``) or
        a new array.

        Column by column with bincount: contiguous passes and no n x k temporaries.
        """
        if out is None:
            out = np.empty_like(x, order="F")
        for j in range(x.shape[1]):
            col = x[:, j]
            means = self._group_sums(col) * self.inv_wsum
            slopes = None if self.slope is None else self._group_sums(self.slope * col) * self.inv_ss
            np.subtract(col, means.take(self.codes), out=out[:, j])
            if slopes is not None:
                out[:, j] -= slopes.take(self.codes) * self.slope
        return out


#: Largest number of levels of the small term, within one connected part of the two terms' graph,
#: that :class:`_TwoTerms` solves directly; beyond, alternating projections alone.
DIRECT_MAX_LEVELS = 128

#: Largest (large-term groups x small-term levels) table that :class:`_TwoTerms` holds densely when
#: the two terms form one connected system.
DENSE_CELLS = 4_000_000

#: Sweeps of alternating projections before a column still moving jumps to the direct solution: none
#: when the two terms form one system held densely (a column fresh from the data is never demeaned by
#: one sweep, and the direct solution costs about as much as one; a warm start, see
#: :meth:`Absorber.demean`, is first checked by its group sums), ten when it splits into many parts
#: (building their layout costs about as much as ten sweeps; unbalanced panels and unit trends can take
#: hundreds), none for an absorber :meth:`~Absorber.reweighted` from another (a step of an iteratively
#: reweighted fit: the layout, built once, serves every later step, whose systems' new entries and
#: inverses cost a few sweeps; columns rarely converge in ten sweeps under new weights), and none for one
#: built with ``direct_at_once`` (its caller builds the layout anyway).
DIRECT_AFTER_DENSE = 0
DIRECT_AFTER = 10


def _pinv(gram: np.ndarray) -> np.ndarray:
    """Pseudo-inverse of a symmetric positive semi-definite matrix (eigenvalues below 1e-12 of the
    largest count as zero)."""
    eigval, eigvec = np.linalg.eigh((gram + gram.T) / 2)
    keep = eigval > 1e-12 * max(float(eigval.max()), 1e-300)
    return (eigvec[:, keep] / eigval[keep]) @ eigvec[:, keep].T


def _pinv_many(grams: Sequence[np.ndarray]) -> list[np.ndarray]:
    """:func:`_pinv` of each matrix, those of one size in one batched eigendecomposition (a region's
    periods: one small system per region)."""
    out: list[np.ndarray] = [np.empty((0, 0))] * len(grams)
    by_size: dict[int, list[int]] = {}
    for k, g in enumerate(grams):
        by_size.setdefault(g.shape[0], []).append(k)
    for members in by_size.values():
        stack = np.stack([grams[k] for k in members])
        eigval, eigvec = np.linalg.eigh((stack + stack.transpose(0, 2, 1)) / 2)
        for k, val, vec in zip(members, eigval, eigvec):
            keep = val > 1e-12 * max(float(val.max()), 1e-300)
            out[k] = (vec[:, keep] / val[keep]) @ vec[:, keep].T
    return out


def _part_inverses(stack: np.ndarray, real: np.ndarray) -> np.ndarray:
    """Inverses of the systems of connected parts of :class:`_TwoTerms` (parts, k, k), for right-hand sides
    summing to zero; ``real`` (parts, k) marks each part's own levels, the rest padding (rows and columns of
    zeros, whose inverse entries are zero). Each system ``A`` is symmetric positive semi-definite with
    ``A 1 = 0`` (its levels' dummies sum to the part's rows, which the large term absorbs), so
    ``(A + a 11' / k)^-1``, ``a`` its mean diagonal, solves it exactly on such right-hand sides (the
    pseudo-inverse's solution): one batched Cholesky factorization and inverse instead of
    eigendecompositions, several times cheaper. A part whose shifted system is not clearly positive
    definite (a pivot below 1e-12 of the largest: a nearly disconnected part) takes the pseudo-inverse
    (:func:`_pinv_many`, batched by size), and so do all of them when some system fails to factorize; the
    system of a part of one level is zero (up to rounding), and so is its inverse. A component along ``1``
    of a right-hand side moves the small term's effects by a constant over the part, which the large
    term's residuals do not see."""
    stack = (stack + stack.transpose(0, 2, 1)) / 2
    sizes = real.sum(axis=1)
    mean = np.trace(stack, axis1=1, axis2=2) / np.maximum(sizes, 1)
    ones = real.astype(float)
    shifted = stack + (mean / np.maximum(sizes, 1))[:, None, None] * (ones[:, :, None] * ones[:, None, :])
    pad = ~real
    shifted[pad[:, :, None] & np.eye(real.shape[1], dtype=bool)] = np.broadcast_to(mean[:, None], real.shape)[pad]
    # a system of zeros: a part of one level (its effect is the large term's; rounding may leave a speck)
    empty = (sizes <= 1) | ~(mean > 0)
    shifted[empty] = np.eye(real.shape[1])
    ok = _positive_definite(shifted)
    ok = ~empty & (ok if ok is not None else False)  # (some system not positive definite: pseudo-inverses)
    out = np.zeros_like(stack)
    if ok.any():
        out[ok] = np.linalg.inv(shifted[ok])
        out[ok & pad.any(axis=1)] *= (ones[:, :, None] * ones[:, None, :])[ok & pad.any(axis=1)]
    rest = np.flatnonzero(~ok & ~empty)
    owns = [np.flatnonzero(real[i]) for i in rest]
    for i, own, inverse in zip(rest, owns, _pinv_many([stack[i][np.ix_(own, own)] for i, own in zip(rest, owns)])):
        out[i][np.ix_(own, own)] = inverse
    return out


def _positive_definite(stack: np.ndarray) -> np.ndarray | None:
    """Per matrix of ``stack``, whether its Cholesky factorization has no pivot below 1e-12 of its largest
    (``None`` when some matrix does not factorize)."""
    try:
        pivots = np.diagonal(np.linalg.cholesky(stack), axis1=1, axis2=2) ** 2
    except np.linalg.LinAlgError:
        return None
    return pivots.min(axis=1) > 1e-12 * pivots.max(axis=1)


#: Most pairs of cells (a large-term group's small-term levels, two at a time) that :class:`_TwoTermsLayout`
#: lists to fill the parts' systems by counting; beyond, a sparse matrix product fills them.
MAX_PAIRS = 2_000_000


class _TwoTermsLayout:
    """What :class:`_TwoTerms` needs that does not depend on the weights (an iteratively reweighted fit
    builds a solver per step, on the same rows): the cells (a group of the large term with a level of
    the small one) that hold rows, each part's block of the small levels, and the pairs of cells of one
    group, whose products fill those blocks."""

    def __init__(self, large_codes: np.ndarray, n_groups: int, small: np.ndarray, n_small: int,
                 parts: np.ndarray) -> None:
        self.n_groups, self.n_small = n_groups, n_small
        self.dense = bool(parts.max(initial=0) == 0 and n_groups * n_small <= DENSE_CELLS)
        if self.dense:
            self.cell_of_row = large_codes * n_small + small
            return
        cells = np.unique(large_codes * n_small + small)
        self.group, self.level = cells // n_small, cells % n_small
        self.n_cells = len(cells)
        self.cell_of_row = np.searchsorted(cells, large_codes * n_small + small)
        n_parts = int(parts.max()) + 1 if len(parts) else 0
        self.parts = parts
        self.sizes = np.bincount(parts, minlength=n_parts)
        self.local = np.empty(n_small, dtype=np.int64)
        order = np.argsort(parts, kind="stable")
        self.local[order] = np.arange(n_small) - np.repeat(np.concatenate([[0], np.cumsum(self.sizes)[:-1]]),
                                                           self.sizes)
        self.offsets = np.concatenate([[0], np.cumsum(self.sizes * self.sizes)[:-1]])
        self.n_entries = int((self.sizes * self.sizes).sum())
        # the parts padded to the largest: each part's levels (parts, k), ``n_small`` past its own, and its
        # system's entries in the blocks laid end to end (parts, k, k), ``n_entries`` (a zero) past its own
        k = int(self.sizes.max(initial=0))
        position = np.arange(k)
        self.real = position[None, :] < self.sizes[:, None]
        self.members = np.full((n_parts, k), n_small, dtype=np.int64)
        self.members[self.real] = order
        inside = self.real[:, :, None] & self.real[:, None, :]
        self.cells = np.where(inside, self.offsets[:, None, None] + position[:, None] * self.sizes[:, None, None]
                              + position[None, None, :], self.n_entries)
        # every pair (a, b) of cells of one group, by group: counting their products into the blocks sums
        # each entry over the groups in order, as the sparse product does (the same bytes)
        per_group = np.bincount(self.group, minlength=n_groups)
        pairs = int((per_group * per_group).sum())
        self.pair_a = self.pair_b = self.pair_entry = None
        if pairs <= MAX_PAIRS:
            first = np.concatenate([[0], np.cumsum(per_group)[:-1]])
            repeat = per_group[self.group]
            a = np.repeat(np.arange(self.n_cells), repeat)
            b = first[self.group[a]] + np.arange(len(a)) - np.repeat(np.cumsum(repeat) - repeat, repeat)
            self.pair_a, self.pair_b, self.pair_entry = a, b, self.entry(self.level[a], self.level[b])
        self.diagonal = self.entry(np.arange(n_small), np.arange(n_small))

    def entry(self, t: np.ndarray, s: np.ndarray) -> np.ndarray:
        """Position of the entry (t, s) of a part's block in the blocks laid end to end."""
        part = self.parts[t]
        return self.offsets[part] + self.local[t] * self.sizes[part] + self.local[s]

    def products(self, left: np.ndarray, right: np.ndarray) -> np.ndarray:
        """The blocks' entries of ``L' R`` for the (groups x small levels) matrices with cell values
        ``left`` and ``right``."""
        if self.pair_entry is not None:
            return np.bincount(self.pair_entry, left[self.pair_a] * right[self.pair_b], minlength=self.n_entries)
        shape = (self.n_groups, self.n_small)
        where = (self.group, self.level)
        product = sp.coo_array(sp.csr_array((left, where), shape=shape).T @ sp.csr_array((right, where), shape=shape))
        return np.bincount(self.entry(product.row, product.col), product.data, minlength=self.n_entries)


class _TwoTerms:
    """Exact residual maker of a large term ``P`` (categorical or trend) and a small categorical term.

    With ``D`` the small term's dummies and ``M_P`` the large term's residual maker, the residuals
    of ``x`` on both are ``M_P x - M_P D g`` with ``g`` solving ``(D'W M_P D) g = D'W M_P x``
    (Frisch-Waugh-Lovell). ``M_P D`` is never formed: within a group of ``P``, the projection of
    a dummy is the group's (weighted) share of the level (plus, for a trend, the slope term), so
    ``D'W M_P D = diag(W_t) - sum_g (c_g c_g' / W_g + e_g e_g' / S_g)`` with ``c_g`` the weighted
    counts of the levels in group ``g``, ``e_g`` the same weighted by the centred time and ``S_g``
    its sum of squares. The system splits into the connected parts of the graph that links each
    group of ``P`` to the levels it holds (period effects within regions: one part per region),
    each solved by a pseudo-inverse (its dummies sum to a constant, which ``P`` absorbs). What does
    not depend on the weights comes from ``layout``, shared by every step of a reweighted fit.
    """

    def __init__(self, large: _Projection, small: np.ndarray, n_small: int, w: np.ndarray,
                 layout: _TwoTermsLayout) -> None:
        self.large = large
        self.small = small
        self.n_small = n_small
        self.w = w
        self.layout = layout
        n_groups = len(large.inv_wsum)
        self.slopes: np.ndarray | None = None
        if layout.dense:  # one system: dense tables
            cells = layout.cell_of_row
            counts = np.bincount(cells, w, minlength=n_groups * n_small).reshape(n_groups, n_small)
            self.shares = counts * large.inv_wsum[:, None]
            gram = np.diag(np.bincount(small, w, minlength=n_small)) - self.shares.T @ counts
            if large.slope is not None:
                timed = np.bincount(cells, w * large.slope, minlength=n_groups * n_small).reshape(n_groups, n_small)
                self.slopes = timed * large.inv_ss[:, None]
                gram -= self.slopes.T @ timed
            self.members = np.arange(n_small)[None, :]
            self.inverses = _part_inverses(gram[None], np.ones((1, n_small), dtype=bool))
            return
        # the values of the (groups x small levels) tables on their cells
        counts = np.bincount(layout.cell_of_row, w, minlength=layout.n_cells)
        self.shares = counts * large.inv_wsum[layout.group]
        blocks = np.subtract(0.0, layout.products(self.shares, counts))  # entries without cells stay +0.0
        blocks[layout.diagonal] += np.bincount(small, w, minlength=n_small)
        if large.slope is not None:
            timed = np.bincount(layout.cell_of_row, w * large.slope, minlength=layout.n_cells)
            self.slopes = timed * large.inv_ss[layout.group]
            blocks -= layout.products(self.slopes, timed)
        # the parts together, padded (see _TwoTermsLayout): their levels and their systems' inverses
        self.members = layout.members
        self.inverses = _part_inverses(np.append(blocks, 0.0)[layout.cells], layout.real)

    def _spread(self, table: np.ndarray, g: np.ndarray) -> np.ndarray:
        """``table @ g`` on each row's group of the large term (``table`` dense, or its cells' values)."""
        if self.layout.dense:
            return (table @ g).take(self.large.codes)
        layout = self.layout
        return np.bincount(layout.group, table * g.take(layout.level), minlength=layout.n_groups).take(self.large.codes)

    def apply(self, x: np.ndarray) -> np.ndarray:
        """Residuals of the columns of ``x`` (Fortran order) on both terms, column by column (so that
        a column's result does not depend on the other columns: no matrix products across them)."""
        xt = self.large.apply(x)
        for j in range(x.shape[1]):
            col = xt[:, j]
            rhs = np.bincount(self.small, col if self.large.unweighted else col * self.w, minlength=self.n_small)
            g = np.zeros(self.n_small + 1)  # (a slot past the levels for the parts' padding)
            g[self.members] = (self.inverses @ np.append(rhs, 0.0)[self.members][:, :, None])[:, :, 0]
            g = g[:-1]
            col -= g.take(self.small)
            col += self._spread(self.shares, g)
            if self.slopes is not None:
                col += self._spread(self.slopes, g) * self.large.slope
        return xt


#: Largest table of level pairs that :func:`_components` holds to look for a level linked to every other.
HUB_CELLS = 1_000_000


def _components(a: np.ndarray, la: int, b: np.ndarray, lb: int) -> int:
    """Connected components of the bipartite graph linking level ``a[i]`` of one term to ``b[i]`` of the
    other (``la`` and ``lb`` levels; a level without rows is a component of its own)."""
    if 0 < la * lb <= HUB_CELLS:  # the usual panel: one level (a period) meets every level of the other term
        table = np.zeros(la * lb, dtype=bool)
        table[a * lb + b] = True
        table = table.reshape(la, lb)
        if table.any(axis=0).all() and table.any(axis=1).all() and (
                table.all(axis=0).any() or table.all(axis=1).any()):
            return 1
    graph = sp.coo_array((np.ones(len(a)), (a, b + la)), shape=(la + lb, la + lb))
    return int(csgraph.connected_components(graph, directed=False)[0])


def _constant_within(values: np.ndarray | None, codes: np.ndarray) -> bool:
    """True when ``values`` take a single value within every level of ``codes``."""
    if values is None or len(values) == 0:
        return False
    last = np.empty(int(codes.max()) + 1)
    last[codes] = values  # one value per level survives; all must equal it
    return bool(np.all(last[codes] == values))


#: rows that :func:`_nested` looks at first: a level split across outer levels usually shows among them
NESTED_PROBE_ROWS = 1 << 16


def _nested(inner: np.ndarray, outer: np.ndarray) -> bool:
    """True when every level of ``inner`` falls within a single level of ``outer``."""
    if len(inner) == 0 or inner is outer:  # (the same codes: a clustering by an absorbed term)
        return True
    last = np.empty(int(inner.max()) + 1, dtype=np.int64)
    if len(inner) > 4 * NESTED_PROBE_ROWS:  # the first rows alone can already say no
        head, head_outer = inner[:NESTED_PROBE_ROWS], outer[:NESTED_PROBE_ROWS]
        last[head] = head_outer
        if not np.array_equal(last[head], head_outer):
            return False
    last[inner] = outer
    return bool(np.all(last[inner] == outer))


def _outranks(other: Term, other_levels: int, other_pos: int, levels: int, pos: int) -> bool:
    """Whether ``other`` stays when it refines a term with ``levels`` levels (identical partitions:
    the earlier term stays; a trend term always stays)."""
    if other.has_slope:
        return True
    return other_levels > levels or (other_levels == levels and other_pos < pos)


class Absorber:
    """Compiled absorbed effects on a fixed set of rows.

    Parameters
    ----------
    frame
        The rows the projections act on (after missing values and singletons were removed), or their
        number when ``codes_of`` gives the terms' codes (and ``time_values`` the time, for trends).
    terms
        The absorbed terms. An empty tuple absorbs the intercept only (pooled OLS with a constant).
    weights
        Optional observation weights; demeaning then uses weighted group means.
    time
        The panel's time column, needed by trend terms.
    tolerance, max_iterations
        Alternating projections stop when ``||x - T x|| <= tolerance * ||x_0||`` for every column
        (``T`` is one sweep over all terms), or after ``max_iterations`` sweeps.
    codes_of, time_values
        The terms' codes on the rows (by default factorized from ``frame``) and the time column's
        values (by default ``frame[time]``).
    direct_at_once
        Columns jump to the direct solution of two terms at once, as a :meth:`reweighted` absorber's do,
        instead of after :data:`DIRECT_AFTER` sweeps: for a caller that builds the direct solver's layout
        anyway (an iteratively reweighted fit's first absorber, whose later steps keep it; a check that
        demeans a few columns once, where the sweeps cost more than the layout).

    Notes
    -----
    The degrees of freedom taken by the absorbed terms (:attr:`absorbed_df`) are the rank of their
    dummy (and slope) columns. A term that a finer term refines is redundant and skipped. For the
    remaining categorical terms, the two with the most levels count ``L1 + L2 - C`` where ``C`` is the number of
    connected components of their bipartite graph (Abowd, Kramarz & Margolis 1999), which is exact;
    each further term counts ``L_j - 1``, an upper bound (conservative standard errors). A trend term
    counts one slope per group in which time varies, plus its group intercepts as a categorical term,
    less one when an effect constant in time (a time effect) spans the sum of the slopes.
    The columns are centred (weighted) before iterating, so ``x_0`` above is the centred column.
    """

    def __init__(
        self,
        frame: pd.DataFrame | int,
        terms: Sequence[Term],
        *,
        weights: np.ndarray | None = None,
        time: str | None = None,
        tolerance: float = DEFAULTS["estimation.tolerance"],
        max_iterations: int = DEFAULTS["estimation.max_iterations"],
        codes_of: CodesOf | None = None,
        time_values: np.ndarray | None = None,
        direct_at_once: bool = False,
    ) -> None:
        if isinstance(frame, int):  # the number of rows: codes_of (and time_values, for trends) give the rest
            n = frame
            if codes_of is None:
                raise ValueError("an absorber on a number of rows needs codes_of")
        else:
            n = len(frame)
            codes_of = codes_of or _default_codes(frame)
            if time_values is None and time and time in frame:
                time_values = frame[time].to_numpy(dtype=float)
        self.n_obs = n
        self.tolerance = float(tolerance)
        self.max_iterations = int(max_iterations)
        self.w = np.ones(n) if weights is None else np.asarray(weights, dtype=float)
        self.terms = tuple(terms)
        self.levels: dict[str, int] = {}
        self._codes: list[np.ndarray] = []
        self._nlev: list[int] = []
        slopes: list[np.ndarray | None] = []
        self._time = time_values if time else None
        for term in self.terms:
            codes = codes_of(term.groups)
            nlev = int(codes.max()) + 1 if n else 0
            self.levels[term.label()] = nlev
            self._codes.append(codes)
            self._nlev.append(nlev)
            if term.has_slope and time and self._time is None:
                raise KeyError(time)
            slopes.append(self._time if term.has_slope and time else None)
        # skip a term that a finer term refines (each of the finer term's groups lies inside one of
        # its groups): its dummies are sums of the finer term's dummies
        active = []
        for i, term in enumerate(self.terms):
            redundant = not term.has_slope and any(
                j != i and _outranks(self.terms[j], self._nlev[j], j, self._nlev[i], i)
                and _nested(self._codes[j], self._codes[i])
                for j in range(len(self.terms))
            )
            if not redundant:
                active.append(i)
        self._active = active
        self._slopes = slopes
        self._ranks: dict[tuple[int, ...], int] = {}
        self._projections = self._project()
        # its columns jump to the direct solution at once (see DIRECT_AFTER): set here by direct_at_once,
        # and by reweighted() for every absorber it makes
        self._jump_at_once = direct_at_once

    def _project(self) -> list[_Projection]:
        if not self.terms:
            return [_Projection(np.zeros(self.n_obs, dtype=np.int64), 1, self.w, None)]
        return [_Projection(self._codes[i], self._nlev[i], self.w, self._slopes[i]) for i in self._active]

    def reweighted(self, weights: np.ndarray) -> Absorber:
        """The same terms on the same rows with other weights (each step of an iteratively reweighted
        fit): the codes, the redundant terms and the direct solver's connected parts, which do not
        depend on the weights, are reused; everything else is computed as a new absorber would."""
        new = copy.copy(self)
        new.w = np.asarray(weights, dtype=float)
        new._jump_at_once = True  # its columns jump at once (see DIRECT_AFTER); the layout, once built, is kept
        for weighted in ("_direct", "absorbed_df"):  # cached on first use: the new weights' own
            new.__dict__.pop(weighted, None)
        new._ranks = {}  # a trend's slopes count the groups where time varies with weight
        new._projections = new._project()
        return new

    @cached_property
    def _direct_setup(self) -> tuple[int, int, int, np.ndarray] | None:
        """Whether the direct solver applies (two active terms, the smaller a categorical effect with few
        levels in each connected part of the two; see :class:`_TwoTerms`): the positions of the large and
        the small projection, the sweeps before the jump and each small level's connected part."""
        if len(self._projections) != 2:
            return None
        a, b = sorted(range(2), key=lambda j: (self._projections[j].slope is None, -self._nlev[self._active[j]]))
        large, small = self._projections[a], self._projections[b]
        if small.slope is not None:
            return None
        n_large, n_small = len(large.inv_wsum), self._nlev[self._active[b]]
        if n_small <= DIRECT_MAX_LEVELS and n_large * n_small <= DENSE_CELLS:
            return a, b, DIRECT_AFTER_DENSE, np.zeros(n_small, dtype=np.int64)
        graph = sp.coo_array((np.ones(len(small.codes)), (large.codes, small.codes + n_large)),
                             shape=(n_large + n_small, n_large + n_small))
        parts = csgraph.connected_components(graph, directed=False)[1][n_large:]
        if np.bincount(parts).max() > DIRECT_MAX_LEVELS:
            return None
        return a, b, DIRECT_AFTER, np.unique(parts, return_inverse=True)[1]

    @cached_property
    def _direct(self) -> _TwoTerms | None:
        """The direct solver of the two terms, built when first needed."""
        if self._direct_setup is None:
            return None
        a, b, _, _ = self._direct_setup
        return _TwoTerms(self._projections[a], self._projections[b].codes, self._nlev[self._active[b]], self.w,
                         self._direct_layout)

    @cached_property
    def _direct_layout(self) -> _TwoTermsLayout:
        """The direct solver's layout (its cells and blocks), which a reweighted absorber keeps."""
        assert self._direct_setup is not None
        a, b, _, parts = self._direct_setup
        large = self._projections[a]
        return _TwoTermsLayout(large.codes, len(large.inv_wsum), self._projections[b].codes,
                               self._nlev[self._active[b]], parts)

    @cached_property
    def absorbed_df(self) -> int:
        """Degrees of freedom taken by the absorbed terms (see the Notes); counted when first asked
        (a Poisson fit builds an absorber per step and asks once)."""
        return self._rank(self._active) if self.terms else 1

    def _rank(self, members: Sequence[int]) -> int:
        """Rank of the dummy (and slope) columns of the active terms ``members`` (see the Notes); each set
        counted once (the cluster variables of several covariance choices often nest the same terms)."""
        key = tuple(members)
        if key not in self._ranks:
            self._ranks[key] = self._count_rank(members)
        return self._ranks[key]

    def _count_rank(self, members: Sequence[int]) -> int:
        df = 0
        cats = sorted(members, key=lambda i: -self._nlev[i])
        for i in members:
            proj = self._projections[self._active.index(i)]
            if proj.slope is not None:
                df += int(np.count_nonzero(proj.inv_ss))
        for pos, i in enumerate(cats):
            df += self._nlev[i] - (1 if pos >= 2 else 0)
        if len(cats) >= 2:
            a, b = cats[0], cats[1]
            df -= _components(self._codes[a], self._nlev[a], self._codes[b], self._nlev[b])
        for i in members:
            if self._projections[self._active.index(i)].slope is None:
                continue
            # the slopes sum to the time variable itself, which an effect constant in time spans
            if any(j != i and not self.terms[j].has_slope
                   and _constant_within(self._time, self._codes[j]) for j in members):
                df -= 1
        return df

    def nested_df(self, cluster_codes: Sequence[np.ndarray]) -> int:
        """Rank of the absorbed columns that are nested in every one of the cluster variables.

        The nested terms together take the rank of their own columns (computed as in
        :attr:`absorbed_df`, restricted to them), never more than :attr:`absorbed_df`: a redundant
        term (refined by a finer one) adds nothing, and two nested terms that overlap (``unit`` and
        ``region x year`` inside ``region`` clusters) count their union once.
        """
        if not self.terms or not cluster_codes:
            return 0
        nested = [i for i in self._active if all(_nested(self._codes[i], c) for c in cluster_codes)]
        return min(self._rank(nested), self.absorbed_df) if nested else 0

    def nested_in(self, cluster_codes: np.ndarray) -> bool:
        """Whether every absorbed column lies within single clusters (the intercept alone never does,
        unless there is one cluster)."""
        if not self.terms:
            return bool(len(cluster_codes) == 0 or cluster_codes.max() == cluster_codes.min())
        return all(_nested(self._codes[i], cluster_codes) for i in self._active)

    def _sweep(self, x: np.ndarray) -> np.ndarray:
        for proj in self._projections:
            x = proj.apply(x)
        return x

    def sweep_bound(self, v: np.ndarray) -> float | None:
        """An upper bound of the weighted norm of ``v - sweep(v)``, from each term's group sums of ``v``
        alone (no projection applied): with ``a_k = ||v - M_k v||`` for the terms' residual makers ``M_k``
        in the sweep's order (orthogonal projections in the weighted inner product, so that ``a_k`` is
        the norm of ``v``'s group means, ``sqrt(sum_g S_g^2 / W_g)``), the sweep ``M_K ... M_1`` moves
        ``v`` by at most ``sum_k 2^(K-k) a_k`` (by the triangle inequality, step by step). ``None`` when a
        term has slopes (trends)."""
        bound = 0.0
        last = len(self._projections) - 1
        for k, proj in enumerate(self._projections):
            if proj.slope is not None:
                return None
            sums = proj._group_sums(v)
            bound += 2.0 ** (last - k) * float(np.sqrt(np.dot(sums * sums, proj.inv_wsum)))
        return bound

    def demean_cells(self, x: np.ndarray) -> DemeanOutcome | None:
        """:meth:`demean` of columns in which rows of groups alike hold the same values, on a table of cells.

        With two categorical terms, unit weights and at most one row per pair of their groups (a panel's
        unit and period effects), two groups of the larger term are alike when they have rows at the same
        levels of the smaller term with the same values of ``x`` there (units of one adoption cohort
        observed in the same periods, for indicators of cohort and period). Alike groups take the same
        effect in the least-squares projection (it is unique, and swapping them leaves it unchanged), so
        the projection is that of the table of (class of alike groups, level) cells, each weighted by its
        rows: the same residuals, from a table of a few hundred cells instead of every row. ``None`` when
        this does not apply; every condition is checked exactly on the rows (the hashes that group the
        candidates only propose)."""
        x = np.asarray(x, dtype=float)
        if x.ndim != 2 or len(self._projections) != 2 or any(p.slope is not None for p in self._projections) \
                or not len(x) or not np.all(self.w == self.w[0]):
            return None
        big, small = sorted(self._active, key=lambda i: -self._nlev[i])
        a, b = self._codes[big], self._codes[small]
        na, nb = self._nlev[big], self._nlev[small]
        n = len(a)
        if na * nb > DENSE_CELLS or np.bincount(a.astype(np.int64) * nb + b, minlength=na * nb).max() > 1:
            return None
        rng = np.random.default_rng(20261203)  # fixed: the hashes only propose classes, checked below
        level_hash = rng.uniform(1.0, 2.0, size=nb)
        row_hash = (x @ rng.uniform(1.0, 2.0, size=x.shape[1])) * rng.uniform(1.0, 2.0, size=nb)[b]
        signature = np.column_stack([np.bincount(a, minlength=na), np.bincount(a, level_hash[b], minlength=na),
                                     np.bincount(a, row_hash, minlength=na)])
        klass = np.unique(signature, axis=0, return_inverse=True)[1].ravel()
        cells, cell = np.unique(klass[a].astype(np.int64) * nb + b, return_inverse=True)
        cell = cell.ravel()
        if len(cells) * 4 > n:  # little to gain
            return None
        rows_per_cell = np.bincount(cell)
        if not np.array_equal(rows_per_cell, np.bincount(klass)[cells // nb]):  # alike groups share their levels
            return None
        first = np.empty(len(cells), dtype=np.int64)
        first[cell[::-1]] = np.arange(n)[::-1]
        table = x[first]
        if not np.array_equal(table[cell], x):  # the same values in alike groups' rows
            return None
        # the table's projection, solved directly: its dummies weighted by the cells' rows
        klass_of_cell = np.unique(cells // nb, return_inverse=True)[1].ravel()
        level_of_cell = np.unique(cells % nb, return_inverse=True)[1].ravel()
        n_cells, width = len(cells), int(klass_of_cell.max()) + int(level_of_cell.max()) + 2
        root = np.sqrt(rows_per_cell.astype(float))
        dummies = np.zeros((n_cells, width))
        dummies[np.arange(n_cells), klass_of_cell] = root
        dummies[np.arange(n_cells), int(klass_of_cell.max()) + 1 + level_of_cell] = root
        scaled = table * root[:, None]
        residual = (scaled - dummies @ (np.linalg.pinv(dummies) @ scaled)) / root[:, None]
        k = x.shape[1]
        return DemeanOutcome(residual[cell], np.ones(k, dtype=np.int64), np.ones(k, dtype=bool))

    def demean(self, x: np.ndarray, *, warm: bool = False, overwrite: bool = False) -> DemeanOutcome:
        """Residuals of the columns of ``x`` (n, k) on all absorbed terms.

        One projection is exact in one sweep. Several are iterated: ``x <- x - t (x - T x)`` with
        the Gearhart & Koshy (1989) step ``t = <x, x - T x> / ||x - T x||^2`` (weighted inner
        products), which minimises the distance to the solution along the sweep's direction. Columns
        not converged after :data:`DIRECT_AFTER_DENSE` or :data:`DIRECT_AFTER` sweeps (none when the
        absorber was :meth:`reweighted` or built with ``direct_at_once``) jump to the direct solution of
        two terms (:class:`_TwoTerms`) when it applies; its terms' group sums confirm it
        (:meth:`sweep_bound`: the sweep could not move it beyond the tolerance), or failing them the next
        sweep.
        ``warm`` says that the columns start near their solution (each step of an iteratively reweighted
        fit starts from the previous step's): a column about to jump at once is first checked by its group
        sums, which may confirm it as it is (a sweep first would seldom confirm it, and costs as much as the
        jump). ``overwrite`` lets the result take the place of ``x`` when it is a float
        array in Fortran order that the caller no longer needs (no copy of the columns).
        """
        x = np.asarray(x, dtype=float, order="F") if overwrite else np.array(x, dtype=float, order="F")
        if x.ndim == 1:
            x = x[:, None]
        unweighted = bool(np.all(self.w == 1.0))

        def wdot(a: np.ndarray, b: np.ndarray) -> float:
            return float(np.dot(a, b)) if unweighted else float(np.dot(self.w * a, b))

        # every choice absorbs the intercept, so centring first changes nothing but the precision.
        # Every reduction below runs column by column, so that a column's result does not depend on
        # which other columns are demeaned with it (a refit of some columns gives the same bytes).
        wsum = self.w.sum()
        k = x.shape[1]
        norms = np.empty(k)
        for j in range(k):
            x[:, j] -= np.dot(self.w, x[:, j]) / wsum
            norms[j] = np.sqrt(wdot(x[:, j], x[:, j]))
        iterations = np.ones(k, dtype=np.int64)
        converged = np.ones(k, dtype=bool)
        if len(self._projections) <= 1:  # exact in one projection, on our own copy
            if self.terms:  # (the intercept alone: the centring was its projection)
                self._projections[0].apply(x, out=x)
            return DemeanOutcome(x, iterations, converged, norms)

        jump = 0
        if self._direct_setup is not None:  # (decided before any column: each column's bytes are its own)
            jump = (DIRECT_AFTER_DENSE if self._jump_at_once else self._direct_setup[2]) + 1
        converged[:] = False
        # one column at a time: its n-vectors are reused from column to column (no n x k temporaries)
        for j in range(k):
            cur = x[:, j].copy()
            scale = norms[j] or 1.0
            for it in range(1, self.max_iterations + 1):
                if it == jump and self._direct is not None:
                    if warm and it == 1:  # near its solution already: its group sums may confirm it as it is
                        bound = self.sweep_bound(cur)
                        if bound is not None and bound <= self.tolerance * scale:
                            x[:, j] = cur
                            converged[j] = True
                            break
                    # slow to converge: jump to the direct solution, which its group sums (or the next
                    # sweep) confirm. It projects the column as it came (still in x): the same solution as
                    # from where the iterations left it, without the rounding their extrapolated steps
                    # accumulate
                    cur = self._direct.apply(x[:, j: j + 1])[:, 0]
                    bound = self.sweep_bound(cur)
                    if bound is not None and bound <= self.tolerance * scale:  # confirmed without the sweep
                        x[:, j] = cur
                        iterations[j] = it
                        converged[j] = True
                        break
                tx = self._sweep(cur[:, None])[:, 0]
                d = cur - tx
                dd = wdot(d, d)
                iterations[j] = it
                if np.sqrt(dd) <= self.tolerance * scale:
                    x[:, j] = tx
                    converged[j] = True
                    break
                step = wdot(cur, d) / dd
                step = step if np.isfinite(step) and step > 0 else 1.0
                cur -= d * step
            else:
                x[:, j] = cur
        return DemeanOutcome(x, iterations, converged, norms)
