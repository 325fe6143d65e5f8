"""The specification-curve figure (layout after Simonsohn, Simmons & Nelson 2020).

Top panel: the fitted estimates of one outcome x focal pair, sorted, with their confidence
intervals; significant estimates are coloured by sign, the baseline is marked and zero is drawn.
Bottom panel, sharing the x axis: one row per choice of each grid dimension that varies, with a
mark where a specification uses the choice. Row heights are fixed in inches, so labels never
overlap however many choices there are; marks and interval lines thin out as specifications grow
(readable from 10 to a few thousand). Colours are from the Okabe & Ito (2008) colour-blind-safe set.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from .defaults import DEFAULTS  # noqa: E402
from .ledger import DIMENSIONS, STATUS_OK  # noqa: E402
from .store import pair_slug  # noqa: E402,F401 - re-exported for callers of this module

__all__ = ["draw_curve", "save_curve", "pair_slug", "PALETTE"]

#: Okabe-Ito colours: positive significant, negative significant, not significant, baseline.
PALETTE = {"positive": "#0072B2", "negative": "#D55E00", "neutral": "#A0A0A0", "baseline": "#000000",
           "band": "#F0E442"}
_ROW_INCHES = 0.17
_LABEL_CHARS = 30


def _short(name: str) -> str:
    return name if len(name) <= _LABEL_CHARS else name[: _LABEL_CHARS - 1] + "\u2026"


def draw_curve(ledger: pd.DataFrame, *, level: float = DEFAULTS["confidence_level"],
               dimensions: Sequence[str] = DIMENSIONS, title: str | None = None) -> Figure:
    """Draw the curve of one outcome x focal pair (``ledger`` holds that pair's rows)."""
    alpha = 1.0 - level
    ok = ledger[ledger["status"] == STATUS_OK].sort_values(["estimate", "spec_id"]).reset_index(drop=True)
    n = len(ok)
    dims = [d for d in dimensions if d not in ("outcome", "focal") and ok[d].nunique() > 1] if n else []
    rows: list[tuple[str, str]] = [(d, c) for d in dims for c in sorted(ok[d].unique(), key=str)]
    bottom_in = max(0.6, _ROW_INCHES * (len(rows) + 1.3 * len(dims)) + 0.5)
    top_in = 3.0
    fig = plt.figure(figsize=(7.5, top_in + bottom_in + 0.9))
    grid = fig.add_gridspec(2, 1, height_ratios=[top_in, bottom_in], hspace=0.06,
                            left=0.24, right=0.98, top=1 - 0.55 / (top_in + bottom_in + 0.9),
                            bottom=0.45 / (top_in + bottom_in + 0.9))
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
    handles = [
        plt.Line2D([], [], marker="o", linestyle="", color=PALETTE["positive"], label=f"p < {alpha:.2g}, positive"),
        plt.Line2D([], [], marker="o", linestyle="", color=PALETTE["negative"], label=f"p < {alpha:.2g}, negative"),
        plt.Line2D([], [], marker="o", linestyle="", color=PALETTE["neutral"], label="not significant"),
    ]
    if len(base):
        handles.append(plt.Line2D([], [], marker="D", linestyle="", markerfacecolor="none",
                                  markeredgecolor=PALETTE["baseline"], label="baseline"))
    ax_top.legend(handles=handles, loc="upper left", fontsize=7, frameon=False, ncol=2)
    ax_top.set_ylabel(f"estimate ({level:.0%} CI)", fontsize=8)
    ax_top.axhline(median, color="#666666", linewidth=0.6, linestyle=":", zorder=0)
    ax_top.tick_params(labelbottom=False, labelsize=7)
    ax_top.spines[["top", "right"]].set_visible(False)
    not_fitted = len(ledger) - n
    head = title or f"{ledger['outcome'].iloc[0]} on {ledger['focal'].iloc[0]}"
    fixed = [f"{d} = {ok[d].iloc[0]}" for d in dimensions
             if d not in ("outcome", "focal") and n and ok[d].nunique() == 1]
    ax_top.set_title(f"{head}: {n} fitted specifications"
                     + (f" ({not_fitted} not identified or failed, not shown)" if not_fitted else "")
                     + (f"\nin every one: {'; '.join(fixed)}" if fixed else ""),
                     fontsize=9, loc="left")

    # bottom panel: one row per choice, grouped by dimension under a header row naming it
    ypos, labels, headers, y = {}, [], [], 0.0
    for d in dims:
        headers.append((y, d))
        y += 1.0
        for c in sorted(ok[d].unique(), key=str):
            ypos[(d, c)] = y
            labels.append((y, _short(str(c))))
            y += 1.0
        y += 0.3
    mark = "|" if n > 150 else "o"
    msize = float(np.clip(1500 / max(n, 1), 2, 16)) if mark == "o" else 14
    for d in dims:
        yy = ok[d].map(lambda c, d=d: ypos[(d, c)]).to_numpy(dtype=float)
        ax_bot.scatter(x, yy, marker=mark, s=msize, c="#333333", linewidths=0.6 if mark == "|" else 0)
    ax_bot.set_yticks([p for p, _ in labels], [t for _, t in labels], fontsize=6.5)
    ax_bot.set_ylim(y - 0.5, -0.7)
    for i, (yh, d) in enumerate(headers):
        ax_bot.text(0.0, yh, f" {d}", transform=ax_bot.get_yaxis_transform(), ha="left", va="center",
                    fontsize=7.5, fontweight="bold", color="#222222")
        if i:
            ax_bot.axhline(yh - 0.65, color="#DDDDDD", linewidth=0.6)
    ax_bot.set_xlabel("specifications, ranked by estimate", fontsize=8)
    ax_bot.set_xlim(-0.5 - n * 0.01, n - 0.5 + n * 0.01)
    ax_bot.tick_params(labelsize=7)
    ax_bot.spines[["top", "right"]].set_visible(False)
    return fig


def save_curve(fig: Figure, png: str | Path, pdf: str | Path) -> None:
    """Write the figure as PNG (200 dpi) and vector PDF, each atomically."""
    from .store import atomic_write

    atomic_write(png, lambda fh: fig.savefig(fh, format="png", dpi=200))
    atomic_write(pdf, lambda fh: fig.savefig(fh, format="pdf", metadata={"CreationDate": None}))
    plt.close(fig)
