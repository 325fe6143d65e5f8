"""The staggered-adoption exhibits: for each outcome and declared treatment (``data.treatment``), an
event-study figure that overlays the estimators, the decomposition figure of the two-way estimate, and
the appendix section that puts them side by side with the diagnostics and the cautions.

The exhibits show one specification per estimator choice: the *reference* two-way fit (a
least-squares fit of the treatment with the decomposition, closest to the grid's baseline choices),
and for every other estimator the specification that shares the most choices with it. The ledger
and the coefficient table hold every other specification.
"""

from __future__ import annotations

import io
from collections.abc import Mapping

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from .estimators import CURVE_LABELS, LEAST_SQUARES  # noqa: E402
from .ledger import DIMENSIONS, STATUS_OK  # noqa: E402
from .store import pair_slug  # noqa: E402

__all__ = ["adoption_designs", "representatives", "draw_event_study", "draw_decomposition", "latex_section",
           "COMPARISON_LABELS", "decomposition_of"]

#: How the appendix names the 2x2 comparisons of Goodman-Bacon (2021).
COMPARISON_LABELS = {
    "earlier_vs_later": "earlier vs later adopters (before the later adopt)",
    "later_vs_earlier": "later vs earlier adopters (already treated as controls)",
    "treated_vs_never": "adopters vs never treated",
}
_COLOURS = ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000"]
_MARKERS = {"earlier_vs_later": "o", "later_vs_earlier": "^", "treated_vs_never": "s"}
_OTHER_DIMS = [d for d in DIMENSIONS if d not in ("outcome", "focal", "estimator")]


def adoption_designs(ledger: pd.DataFrame) -> list[tuple[str, str]]:
    """The (outcome, treatment) pairs of the ledger fitted with the staggered-adoption diagnostics."""
    if "cohorts" not in ledger:
        return []
    rows = ledger[ledger["cohorts"] >= 0]
    return sorted({(str(o), str(f)) for o, f in zip(rows["outcome"], rows["focal"])})


def slug_of(outcome: str, focal: str) -> str:
    return pair_slug(outcome, focal)


def representatives(ledger: pd.DataFrame, outcome: str, focal: str,
                    baseline: Mapping[str, str] | None = None) -> pd.DataFrame:
    """One fitted specification per estimator choice of the design (the reference two-way fit first)."""
    rows = ledger[(ledger["outcome"] == outcome) & (ledger["focal"] == focal) & (ledger["status"] == STATUS_OK)]
    if rows.empty:
        return rows
    baseline = baseline or {}

    def matches(row: pd.Series, names: Mapping[str, str]) -> int:
        return sum(str(row[d]) == str(names.get(d)) for d in _OTHER_DIMS)

    ls = rows[rows["curve"] == LEAST_SQUARES]
    if not ls.empty:
        order = ls.assign(_has=(ls["decomposition"] != "").astype(int),
                          _match=[matches(r, baseline) for _, r in ls.iterrows()])
        reference = order.sort_values(["_has", "_match", "spec_id"], ascending=[False, False, True]).iloc[0]
    else:
        reference = rows.sort_values("spec_id").iloc[0]
    names = {d: str(reference[d]) for d in _OTHER_DIMS}
    chosen = [reference]
    for est in sorted(set(rows["estimator"]) - {reference["estimator"]}):
        mine = rows[rows["estimator"] == est]
        scored = mine.assign(_match=[matches(r, names) for _, r in mine.iterrows()])
        chosen.append(scored.sort_values(["_match", "spec_id"], ascending=[False, True]).iloc[0])
    return pd.DataFrame(chosen)[list(ledger.columns)].reset_index(drop=True)


def decomposition_of(row: pd.Series) -> pd.DataFrame:
    """The 2x2 comparisons stored in a ledger row (empty when it has none)."""
    text = str(row.get("decomposition", "") or "")
    if not text:
        return pd.DataFrame(columns=["comparison", "treated", "control", "estimate", "weight"])
    return pd.read_json(io.StringIO(text), orient="records", dtype={"treated": str, "control": str})


def _label(labels: Mapping[str, str], name: str) -> str:
    return str(labels.get(name, name))


def draw_event_study(chosen: pd.DataFrame, coefficients: pd.DataFrame, *, level: float,
                     labels: Mapping[str, str] | None = None, title: str = "") -> Figure:
    """Estimates by relative period with their pointwise intervals, one series per estimator (offset
    sideways); group-time effects also show their uniform band (wide, pale)."""
    labels = labels or {}
    fig, ax = plt.subplots(figsize=(6.75, 4.4))
    series = []
    for _, row in chosen.iterrows():
        mine = coefficients["spec_id"] == row["spec_id"]
        part = coefficients[mine & coefficients["term"].str.match(r"^rel=[-+]\d+$")]
        if not part.empty:
            series.append((row, part.assign(k=part["term"].str[4:].astype(int)).sort_values("k")))
    width = 0.6 / max(len(series), 1)
    for i, (row, part) in enumerate(series):
        x = part["k"].to_numpy() + (i - (len(series) - 1) / 2) * width
        colour = _COLOURS[i % len(_COLOURS)]
        critical = float(row.get("uniform_critical", float("nan")))
        if np.isfinite(critical) and "std_error" in part:  # the uniform band, drawn under the pointwise one
            ax.errorbar(x, part["estimate"], yerr=critical * part["std_error"], fmt="none", lw=3, alpha=0.3,
                        color=colour)
        ax.errorbar(x, part["estimate"], yerr=[part["estimate"] - part["ci_low"], part["ci_high"] - part["estimate"]],
                    fmt="o", ms=3.5, lw=1, capsize=2, color=colour,
                    label=f"{_label(labels, str(row['estimator']))} ({str(row['spec_id'])[:8]})"
                    + (" with uniform band" if np.isfinite(critical) else ""))
    ax.axhline(0, color="#444444", lw=0.8)
    ax.axvline(-0.5, color="#888888", lw=0.8, ls="--")
    ax.set_xlabel("periods since adoption (0 = first treated period; the reference period is left out)", fontsize=8)
    ax.set_ylabel(f"effect on the outcome\n({level:.0%} CI)", fontsize=8)
    ax.tick_params(labelsize=7.5)
    if series:
        ax.legend(fontsize=7.5, frameon=False, loc="upper center", bbox_to_anchor=(0.5, -0.2), ncol=2)
    else:
        ax.text(0.5, 0.5, "no estimator of this design reports relative periods", ha="center", va="center",
                transform=ax.transAxes, fontsize=8)
    ax.set_title(title, fontsize=9, loc="left")
    fig.tight_layout()
    return fig


def draw_decomposition(row: pd.Series | None, *, title: str = "") -> Figure:
    """The 2x2 estimates of the two-way estimate against their weights (Goodman-Bacon 2021), by comparison."""
    fig, ax = plt.subplots(figsize=(6.75, 4.2))
    table = decomposition_of(row) if row is not None else decomposition_of(pd.Series(dtype=object))
    if table.empty:
        ax.text(0.5, 0.5, "no decomposition: it needs a least-squares fit of the treatment with unit and period\n"
                "effects only, no controls or weights, on a balanced panel", ha="center", va="center",
                transform=ax.transAxes, fontsize=8)
        ax.set_axis_off()
    else:
        for i, (kind, part) in enumerate(table.groupby("comparison", sort=True)):
            ax.scatter(part["weight"], part["estimate"], s=22, marker=_MARKERS.get(str(kind), "o"),
                       color=_COLOURS[i % len(_COLOURS)], label=COMPARISON_LABELS.get(str(kind), str(kind)))
        assert row is not None
        ax.axhline(float(row["estimate"]), color="#000000", lw=0.8, ls="--",
                   label=f"two-way estimate {float(row['estimate']):.3g}")
        ax.axhline(0, color="#888888", lw=0.6)
        ax.set_xlabel("weight in the two-way estimate", fontsize=8)
        ax.set_ylabel("2x2 difference-in-differences estimate", fontsize=8)
        ax.tick_params(labelsize=7.5)
        ax.legend(fontsize=7.5, frameon=False, loc="upper center", bbox_to_anchor=(0.5, -0.2), ncol=2)
    ax.set_title(title, fontsize=9, loc="left")
    fig.tight_layout()
    return fig


def _tex(text: object) -> str:
    from .report import latex_escape

    return latex_escape(text)


def _n(x: float, digits: int = 3) -> str:
    return "" if not np.isfinite(x) else f"{x:.{digits}f}"


def latex_section(ledger: pd.DataFrame, outcome: str, focal: str, event_pdf: str, decomposition_pdf: str, *,
                  level: float, baseline: Mapping[str, str] | None = None,
                  labels: Mapping[str, str] | None = None) -> str:
    """The appendix section of one staggered design."""
    labels = labels or {}
    chosen = representatives(ledger, outcome, focal, baseline)
    title = f"{_label(labels, focal)} on {_label(labels, outcome)}"
    out = [rf"\clearpage\subsection*{{Staggered adoption: {_tex(title)}}}"]
    if chosen.empty:
        out.append("No specification of this design was fitted.")
        return "\n".join(out)
    ref = chosen.iloc[0]
    out.append(
        f"The treatment \\texttt{{{_tex(focal)}}} is adopted in {int(ref['cohorts'])} cohort(s) inside the sample "
        f"periods of the reference fit (\\texttt{{{_tex(str(ref['spec_id'])[:8])}}}: "
        + ", ".join(f"{d} {_tex(ref[d])}" for d in _OTHER_DIMS)
        + f"), with {int(ref['never_treated_units'])} never-treated unit(s) and {int(ref['not_yet_treated_obs'])} "
        "not-yet-treated observation(s). Each estimator below is shown on the specification that shares the most "
        "choices with the reference; the ledger holds the others.")
    rows = []
    for _, r in chosen.iterrows():
        curve = str(r["curve"])
        extra = []
        if np.isfinite(r["uniform_critical"]):
            extra.append(f"uniform band critical value {r['uniform_critical']:.2f}")
        if r["message"]:
            extra.append(str(r["message"]))
        rows.append(" & ".join([
            _tex(_label(labels, str(r["estimator"]))), _tex(CURVE_LABELS.get(curve, curve)), _n(r["estimate"]),
            _n(r["std_error"]), f"[{_n(r['ci_low'])}, {_n(r['ci_high'])}]", _n(r["pretrend_p_value"]),
            f"{int(r['n_obs']):,}", r"\parbox[t]{3.2cm}{\raggedright " + _tex("; ".join(extra)) + "}"]) + r" \\")
    out += [
        r"\begin{table}[ht]\centering\footnotesize",
        rf"\caption{{{_tex(title)}: the estimators side by side ({level:.0%} intervals; pre-trend $p$: joint test "
        r"that the pre-adoption relative-period effects are zero).}".replace("%", r"\%"),
        r"\resizebox{\linewidth}{!}{%",
        r"\begin{tabular}{llrrcrrl}\toprule",
        r"Estimator & What it estimates & Estimate & SE & Interval & Pre-trend $p$ & Obs. & Notes \\ \midrule",
        *rows, r"\bottomrule\end{tabular}}", r"\end{table}"]
    table = decomposition_of(ref)
    if not table.empty:
        grouped = table.assign(weighted=table["weight"] * table["estimate"]).groupby("comparison")
        summary = grouped.agg(count=("weight", "size"), total=("weight", "sum"), weighted=("weighted", "sum"))
        lines = [f"{_tex(COMPARISON_LABELS.get(str(k), str(k)))} & {int(v['count'])} & {_n(v['total'])} & "
                 f"{_n(v['weighted'] / v['total'] if v['total'] > 0 else float('nan'))} \\\\"
                 for k, v in summary.iterrows()]
        lines.append(rf"\midrule All & {len(table)} & {_n(table['weight'].sum())} & {_n(float(ref['estimate']))} \\")
        out += [
            r"\begin{table}[ht]\centering\footnotesize",
            rf"\caption{{{_tex(title)}: the two-way estimate of the reference fit as a weighted average of 2x2 "
            r"comparisons (Goodman-Bacon 2021, Theorem 1): number of comparisons, their total weight and their "
            r"weighted mean estimate.}",
            r"\begin{tabular}{lrrr}\toprule",
            r"Comparison & 2x2s & Weight & Mean estimate \\ \midrule", *lines,
            r"\bottomrule\end{tabular}", r"\end{table}"]
    out.append(
        f"\\paragraph{{Negative weights.}} In the reference two-way fit, {int(ref['negative_weights'])} treated "
        f"observation(s) carry a negative weight (summing to {_n(ref['negative_weight_sum'])}); the estimate "
        "would have the opposite sign to the average effect on the treated if the effects' standard deviation "
        f"across treated observations reached {_n(ref['sign_flip_sd'])} (de Chaisemartin \\& D'Haultf\\oe uille "
        "2020, Corollary 1)."
        + (f" Comparisons that use already-treated units as controls carry {ref['already_treated_weight']:.0%} of "
           "the weight.".replace("%", r"\%") if np.isfinite(ref["already_treated_weight"]) else ""))
    out += [
        r"\begin{figure}[ht]\centering",
        rf"\includegraphics[width=\linewidth]{{\fegriddir {event_pdf}}}",
        rf"\caption{{{_tex(title)}: effects by period since adoption, one series per estimator "
        rf"({level:.0%} pointwise intervals; pale wide bars: the group-time effects' uniform band over the window, "
        r"from the multiplier bootstrap; the two-way event study bins the periods beyond the window into its "
        r"end points).}".replace("%", r"\%"),
        r"\end{figure}",
        r"\begin{figure}[ht]\centering",
        rf"\includegraphics[width=\linewidth]{{\fegriddir {decomposition_pdf}}}",
        rf"\caption{{{_tex(title)}: the 2x2 comparisons of the two-way estimate, estimate against weight.}}",
        r"\end{figure}",
        r"\paragraph{Cautions.} Every estimator here rests on parallel trends: without the treatment, adopters' "
        r"outcomes would have moved like their controls'. No estimator tests that assumption; a pre-trend test "
        r"that does not reject is weak evidence, since such tests have low power against the trends that matter "
        r"(Roth 2022). The heterogeneity-robust estimators remove the two-way estimator's bias from changing "
        r"effects, not the bias from anything else that changes when units adopt.",
    ]
    return "\n".join(out)


def baseline_names(raw: Mapping[str, object]) -> dict[str, str]:
    """The grid's baseline choices by dimension (as declared)."""
    base = raw.get("baseline") or {}
    return {str(k): str(v) for k, v in dict(base).items()} if isinstance(base, Mapping) else {}

