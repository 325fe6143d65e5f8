"""The specification-curve figure (layout after Simonsohn, Simmons & Nelson 2020).

Top panel: the fitted estimates of one outcome x focal pair, sorted, with their confidence
intervals; significant estimates are coloured by sign, the baseline is marked and zero is drawn.
Bottom panel, sharing the x axis: one row per choice of each grid dimension that varies, with a
mark where a specification uses the choice. A generated family of samples (``drop_each``: one
sample per dropped level) is one row, since each of its samples leaves out one level and the
influence table says which level moves the estimate. Row heights are fixed in inches, so labels
never overlap however many choices there are; marks and interval lines thin out as
specifications grow (readable from 10 to a few thousand). Colours are from the Okabe & Ito (2008)
colour-blind-safe set.

The figure is drawn at the width of the appendix's text (:data:`WIDTH_IN`) with no text below
:data:`MIN_FONT_PT`, so printed at its own size every label is legible; :func:`print_scale` gives
the factor a page of given size would shrink it by.
"""

from __future__ import annotations

import textwrap
from collections.abc import Mapping, Sequence
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from .defaults import DEFAULTS  # noqa: E402
from .estimators import CURVE_LABELS, LEAST_SQUARES  # noqa: E402
from .ledger import DIMENSIONS, STATUS_OK, sample_family  # noqa: E402
from .store import pair_slug  # noqa: E402,F401 - re-exported for callers of this module

__all__ = ["draw_curve", "draw_comparison", "save_curve", "pair_slug", "print_scale", "PALETTE",
           "WIDTH_IN", "MIN_FONT_PT"]

#: Okabe-Ito colours: positive significant, negative significant, not significant, baseline.
PALETTE = {"positive": "#0072B2", "negative": "#D55E00", "neutral": "#A0A0A0", "baseline": "#000000",
           "band": "#F0E442"}
_ROW_INCHES = 0.16
_LABEL_CHARS = 34
#: The figure's width in inches: the appendix's text width (US letter, 2.2 cm margins), so it prints unscaled.
WIDTH_IN = 6.75
#: The smallest font size in the figure, in points.
MIN_FONT_PT = 7.5


def print_scale(fig: Figure, width_in: float, height_in: float) -> float:
    """The factor by which a page area of ``width_in`` x ``height_in`` inches shrinks the figure
    (1 when it fits at its own size)."""
    w, h = fig.get_size_inches()
    return float(min(1.0, width_in / w, height_in / h))


def _short(name: str) -> str:
    return name if len(name) <= _LABEL_CHARS else name[: _LABEL_CHARS - 1] + "\u2026"


#: Characters per title line: the axes are 66% of the figure's width (4.45 in), at 9 pt.
_TITLE_CHARS = 62


def _what(ledger: pd.DataFrame) -> str:
    """What the curve's estimates are, from the methods of its estimator choices (a curve the user
    grouped across methods names each of them)."""
    if "estimator" not in ledger or "curve" not in ledger:
        return CURVE_LABELS[LEAST_SQUARES]
    methods = sorted(set(ledger["curve"].astype(str)) & set(CURVE_LABELS))
    if len(methods) == 1:
        return CURVE_LABELS[methods[0]]
    return "estimate (" + ", ".join(sorted(set(ledger["estimator"].astype(str)))) + ")"


def draw_curve(ledger: pd.DataFrame, *, level: float = DEFAULTS["confidence_level"],
               dimensions: Sequence[str] = DIMENSIONS, title: str | None = None,
               labels: Mapping[str, str] | None = None) -> Figure:
    """Draw the curve of one outcome x focal pair (``ledger`` holds that pair's rows); ``labels``
    maps column and choice names to the text shown (the config's ``labels``)."""
    display = dict(labels or {})

    def shown(name: object) -> str:
        return str(display.get(str(name), name))

    alpha = 1.0 - level
    ok = ledger[ledger["status"] == STATUS_OK].sort_values(["estimate", "spec_id"]).reset_index(drop=True)
    n = len(ok)
    ok = ok.assign(sample=ok["sample"].astype(str).map(sample_family)) if n else ok
    families = {sample_family(str(s)) for s in ledger["sample"] if ":" in str(s)}
    dims = [d for d in dimensions if d not in ("outcome", "focal") and ok[d].nunique() > 1] if n else []
    rows: list[tuple[str, str]] = [(d, c) for d in dims for c in sorted(ok[d].unique(), key=str)]
    bottom_in = max(0.6, _ROW_INCHES * (len(rows) + 1.3 * len(dims)) + 0.5)
    top_in = 2.8
    # the title: what is plotted, then the choices every specification shares, wrapped to the axes
    not_fitted = len(ledger) - n
    head = title or f"{shown(ledger['outcome'].iloc[0])} on {shown(ledger['focal'].iloc[0])}"
    fixed = [f"{d} = {shown(ok[d].iloc[0])}" for d in dimensions
             if d not in ("outcome", "focal") and n and ok[d].nunique() == 1]
    title_lines = textwrap.wrap(f"{head}: {n} fitted specifications"
                                + (f" ({not_fitted} not identified or failed, not shown)" if not_fitted else ""),
                                _TITLE_CHARS)
    line = "in every one:"
    for i, item in enumerate(fixed):  # whole "dimension = choice" items per line
        text = item + (";" if i < len(fixed) - 1 else "")
        if len(line) + 1 + len(text) > _TITLE_CHARS:
            title_lines.append(line)
            line = text
        else:
            line = f"{line} {text}"
    if fixed:
        title_lines.append(line)
    head_in = 0.25 + 0.16 * len(title_lines)
    fig = plt.figure(figsize=(WIDTH_IN, top_in + bottom_in + 0.65 + head_in))
    height = top_in + bottom_in + 0.65 + head_in
    grid = fig.add_gridspec(2, 1, height_ratios=[top_in, bottom_in], hspace=0.06,
                            left=0.32, right=0.98, top=1 - head_in / height, bottom=0.45 / height)
    ax_top = fig.add_subplot(grid[0])
    ax_bot = fig.add_subplot(grid[1], sharex=ax_top)
    x = np.arange(n)
    est = ok["estimate"].to_numpy(dtype=float)
    median = float(np.median(est)) if n else 0.0
    sig = ok["p_value"].to_numpy(dtype=float) < alpha
    colours = np.where(~sig, PALETTE["neutral"], np.where(est > 0, PALETTE["positive"], PALETTE["negative"]))
    line_w = float(np.clip(250 / max(n, 1), 0.25, 1.6))
    size = float(np.clip(900 / max(n, 1), 1.5, 22))
    ax_top.vlines(x, ok["ci_low"], ok["ci_high"], colors=colours, linewidth=line_w, alpha=0.55, zorder=1)
    ax_top.scatter(x, est, c=colours, s=size, zorder=2, linewidths=0)
    ax_top.axhline(0.0, color="#444444", linewidth=0.8, linestyle=(0, (4, 3)), zorder=0)
    base = np.flatnonzero(ok["is_baseline"].to_numpy(dtype=bool)) if n else np.array([], dtype=int)
    for ax in (ax_top, ax_bot):
        for b in base:
            ax.axvspan(b - 0.5 - n / 400, b + 0.5 + n / 400, color=PALETTE["band"], alpha=0.6, zorder=0,
                       linewidth=0)
    if len(base):
        ax_top.scatter(base, est[base], marker="D", s=max(size * 2.2, 18), facecolors="none",
                       edgecolors=PALETTE["baseline"], linewidths=1.1, zorder=3, label="baseline")
    # the legend names only what the figure shows
    handles = []
    for present, colour, text in ((bool((sig & (est > 0)).any()), "positive", f"p < {alpha:.2g}, positive"),
                                  (bool((sig & (est < 0)).any()), "negative", f"p < {alpha:.2g}, negative"),
                                  (bool((~sig).any()), "neutral", "not significant")):
        if present:
            handles.append(plt.Line2D([], [], marker="o", linestyle="", color=PALETTE[colour], label=text))
    if len(base):
        handles.append(plt.Line2D([], [], marker="D", linestyle="", markerfacecolor="none",
                                  markeredgecolor=PALETTE["baseline"], label="baseline"))
    if n:
        handles.append(plt.Line2D([], [], color="#666666", linewidth=0.8, linestyle=":",
                                  label=f"median {median:.3g}"))
    if handles:
        ax_top.legend(handles=handles, loc="best", fontsize=MIN_FONT_PT, frameon=False, ncol=3)
    ax_top.set_ylabel(f"{_what(ledger)}\n({level:.0%} CI)", fontsize=8)
    ax_top.axhline(median, color="#666666", linewidth=0.8, linestyle=":", zorder=0)
    ax_top.tick_params(labelbottom=False, labelsize=MIN_FONT_PT)
    ax_top.spines[["top", "right"]].set_visible(False)
    ax_top.set_title("\n".join(title_lines), fontsize=9, loc="left")

    # bottom panel: one row per choice, grouped by dimension under a header row naming it
    ypos, labels, headers, y = {}, [], [], 0.0
    for d in dims:
        headers.append((y, d))
        y += 1.0
        for c in sorted(ok[d].unique(), key=str):
            ypos[(d, c)] = y
            text = _short(shown(c))
            if d == "sample" and c in families:
                levels = ledger.loc[ledger["sample"].astype(str).str.startswith(f"{c}:"), "sample"].nunique()
                text = _short(f"{shown(c)} (each of {levels})")
            labels.append((y, text))
            y += 1.0
        y += 0.3
    mark = "|" if n > 150 else "o"
    msize = float(np.clip(1500 / max(n, 1), 2, 16)) if mark == "o" else 14
    for d in dims:
        yy = ok[d].map(lambda c, d=d: ypos[(d, c)]).to_numpy(dtype=float)
        ax_bot.scatter(x, yy, marker=mark, s=msize, c="#333333", linewidths=0.6 if mark == "|" else 0)
    ax_bot.set_yticks([p for p, _ in labels], [t for _, t in labels], fontsize=MIN_FONT_PT)
    ax_bot.set_ylim(y - 0.5, -0.7)
    for i, (yh, d) in enumerate(headers):
        ax_bot.text(0.0, yh, f" {d}", transform=ax_bot.get_yaxis_transform(), ha="left", va="center",
                    fontsize=8, fontweight="bold", color="#222222")
        if i:
            ax_bot.axhline(yh - 0.65, color="#DDDDDD", linewidth=0.6)
    ax_bot.set_xlabel("specifications, ranked by estimate", fontsize=8)
    ax_bot.set_xlim(-0.5 - n * 0.01, n - 0.5 + n * 0.01)
    ax_bot.tick_params(labelsize=MIN_FONT_PT)
    ax_bot.spines[["top", "right"]].set_visible(False)
    return fig


def save_curve(fig: Figure, png: str | Path, pdf: str | Path) -> None:
    """Write the figure as PNG (200 dpi) and vector PDF, each atomically."""
    from .store import atomic_write

    atomic_write(png, lambda fh: fig.savefig(fh, format="png", dpi=200))
    atomic_write(pdf, lambda fh: fig.savefig(fh, format="pdf", metadata={"CreationDate": None}))
    plt.close(fig)


def _only_in(a: pd.DataFrame, b: pd.DataFrame, curve: tuple[str, str, str]) -> int:
    """Specifications of ``curve`` (outcome, focal, curve) in ledger ``a`` and not in ``b``."""
    mine = (a["outcome"].astype(str) == curve[0]) & (a["focal"].astype(str) == curve[1]) & (
        a["curve"].astype(str) == curve[2])
    return int((mine & ~a["spec_id"].isin(b["spec_id"])).sum())


def draw_comparison(old: pd.DataFrame, new: pd.DataFrame, *, level: float = DEFAULTS["confidence_level"],
                    tolerance: float = 1e-8, labels: Mapping[str, str] | None = None) -> Figure:
    """How each specification moved between two ledgers (referee rounds): one panel per outcome x
    focal pair, the old estimate across, the new one up, matched by spec id; the diagonal is "no
    change". Unchanged specifications are grey, moved ones blue, those whose significance at
    ``1 - level`` flipped orange; specifications only in one ledger are counted in the panel's title."""
    display = dict(labels or {})
    alpha = 1.0 - level
    both = old.merge(new, on="spec_id", suffixes=("_old", "_new"))
    both = both[(both["status_old"] == STATUS_OK) & (both["status_new"] == STATUS_OK)]
    pairs = sorted({(str(o), str(f), str(c)) for led in (old, new)
                    for o, f, c in zip(led["outcome"], led["focal"], led["curve"])})
    cols = min(len(pairs), 2) or 1
    rows = -(-len(pairs) // cols) if pairs else 1
    fig, axes = plt.subplots(rows, cols, figsize=(WIDTH_IN, 3.2 * rows + 0.4), squeeze=False)
    for ax in axes.ravel()[len(pairs):]:
        ax.set_visible(False)
    for ax, (outcome, focal, curve) in zip(axes.ravel(), pairs):
        part = both[(both["outcome_new"].astype(str) == outcome) & (both["focal_new"].astype(str) == focal)
                    & (both["curve_new"].astype(str) == curve)]
        a, b = part["estimate_old"].to_numpy(dtype=float), part["estimate_new"].to_numpy(dtype=float)
        moved = np.abs(b - a) > tolerance * np.maximum(np.abs(a), 1e-300)
        flipped = (part["p_value_old"].to_numpy(dtype=float) < alpha) != (part["p_value_new"].to_numpy(dtype=float)
                                                                          < alpha)
        for mask, colour, text in ((~moved & ~flipped, PALETTE["neutral"], "unchanged"),
                                   (moved & ~flipped, PALETTE["positive"], "moved"),
                                   (flipped, PALETTE["negative"], f"significance at {alpha:.2g} flipped")):
            if mask.any():
                ax.scatter(a[mask], b[mask], s=12, color=colour, linewidths=0, label=f"{text} ({int(mask.sum())})")
        if len(a):
            lo, hi = float(np.nanmin([a.min(), b.min()])), float(np.nanmax([a.max(), b.max()]))
            pad = 0.05 * (hi - lo or 1.0)
            ax.plot([lo - pad, hi + pad], [lo - pad, hi + pad], color="#444444", linewidth=0.8, linestyle=(0, (4, 3)))
        only_old, only_new = (_only_in(a, b, (outcome, focal, curve)) for a, b in ((old, new), (new, old)))
        shown_curve = "" if curve == "least_squares" else f" [{curve}]"
        ax.set_title(f"{display.get(outcome, outcome)} on {display.get(focal, focal)}{shown_curve}\n"
                     f"{len(a)} in both; {only_new} added, {only_old} removed", fontsize=8, loc="left")
        ax.set_xlabel("estimate, old ledger", fontsize=8)
        ax.set_ylabel("estimate, new ledger", fontsize=8)
        ax.tick_params(labelsize=MIN_FONT_PT)
        ax.spines[["top", "right"]].set_visible(False)
        if len(a):
            ax.legend(fontsize=MIN_FONT_PT, frameon=False, loc="upper left")
    fig.tight_layout()
    return fig
