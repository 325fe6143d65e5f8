"""Reports from a ledger: summary tables (CSV, Markdown, LaTeX) and the LaTeX appendix.

The appendix (``appendix.tex``) compiles on its own with pdflatex and can also be ``\\input`` into
a paper: it detects whether a document has already begun and only then skips its own preamble.
Figures are looked up under ``\\fegriddir`` (empty by default); a paper that inputs the appendix
from elsewhere sets it first, e.g. ``\\newcommand{\\fegriddir}{reports/demo/}``. A paper needs the
packages booktabs, longtable, graphicx, siunitx and threeparttable.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import tempfile
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd
from tabulate import tabulate

from .grid import Grid
from .joint import method_text, shared_cluster_caution
from .ledger import DEFAULT_CURVE, DIMENSIONS, PAIR, STATUS_OK, sample_family
from .locations import pdflatex
from .store import pair_slug, write_csv, write_text
from .summary import choice_medians, curve_summary, influence
from .tables import Significance

__all__ = ["latex_escape", "write_summaries", "summary_markdown", "summary_latex", "render_appendix",
           "compile_latex",
           "figure_names"]

_LATEX_SPECIAL = {"\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_",
                  "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}", "^": r"\textasciicircum{}"}


def latex_escape(text: object) -> str:
    """Escape LaTeX's special characters in user-supplied names.

    >>> latex_escape("R&D_share 10%")
    'R\\\\&D\\\\_share 10\\\\%'
    """
    return "".join(_LATEX_SPECIAL.get(ch, ch) for ch in str(text))


def _num(x: float, digits: int = 4) -> str:
    if x is None or not np.isfinite(x):
        return ""
    if x != 0 and (abs(x) < 10 ** (-digits + 1) or abs(x) >= 1e6):
        return f"{x:.{digits - 1}e}"
    return f"{x:.{digits}f}"


def _p(p: float) -> str:
    if not np.isfinite(p):
        return ""
    return "$<$0.001" if p < 0.001 else f"{p:.3f}"


def _pct(x: float) -> str:
    return "" if not np.isfinite(x) else f"{100 * x:.1f}\\%"


MATCHED_NOTE = (
    "`matched_shift` is the median change in the estimate when only this dimension's choice changes from the "
    "reference choice (`reference`, the baseline's), over the `matched_pairs` pairs of fitted specifications "
    "that differ in nothing else; `median` is the plain median of every specification under the choice, which "
    "also reflects which specifications the grid holds under it."
)
MATCHED_NOTE_TEX = (
    r"\emph{shift} is the median change in the estimate when only this dimension's choice changes from the "
    r"reference choice (\emph{ref.}, the baseline's), over the \emph{pairs} of fitted specifications that differ "
    r"in nothing else; \emph{median} is the plain median under the choice, which also reflects which "
    r"specifications the grid holds under it."
)


def write_summaries(ledger: pd.DataFrame, level: float, out_dir: str | Path) -> dict[str, Path]:
    """summary.csv / .md / .tex (one row per curve) and choices.csv / .md (per choice)."""
    out_dir = Path(out_dir)
    summ = curve_summary(ledger, level)
    moves = choice_medians(ledger)
    infl = influence(ledger)
    paths = {
        "summary_csv": write_csv(out_dir / "summary.csv", summ),
        "choices_csv": write_csv(out_dir / "choices.csv", moves),
        "influence_csv": write_csv(out_dir / "influence.csv", infl),
        "summary_md": write_text(out_dir / "summary.md", _summary_markdown(summ, moves, level, infl)),
        "summary_tex": write_text(out_dir / "summary.tex", _summary_table(summ, level)),
    }
    return paths


def summary_markdown(ledger: pd.DataFrame, level: float) -> str:
    """summary.md's text: the curves, the choices that move them and the most influential choices."""
    return _summary_markdown(curve_summary(ledger, level), choice_medians(ledger), level, influence(ledger))


def summary_latex(ledger: pd.DataFrame, level: float) -> str:
    """summary.tex's table (booktabs): one row per outcome x focal curve."""
    return _summary_table(curve_summary(ledger, level), level)


def _blank(frame: pd.DataFrame) -> pd.DataFrame:
    """Missing values as None, which the tables print as blanks (never "nan")."""
    return frame.astype(object).where(frame.notna(), None)


def collapse_families(moves: pd.DataFrame) -> pd.DataFrame:
    """One row per generated sample family (``drop_each``) in a choices table: the family's
    specifications and matched pairs added up, the median of its levels' medians and shifts
    (each level's own row is in ``choices.csv``, and which level matters most in the influence table)."""
    if moves.empty:
        return moves
    generated = (moves["dimension"] == "sample") & moves["choice"].astype(str).str.contains(":", regex=False)
    if not generated.any():
        return moves
    rows = []
    for _, part in moves[generated].groupby([*PAIR, "dimension"], sort=False):
        for fam, members in part.groupby(part["choice"].astype(str).map(sample_family), sort=True):
            row = members.iloc[0].copy()
            row["choice"] = f"{fam} (each of {len(members)})"
            row["specs"] = int(members["specs"].sum())
            row["median"] = float(np.median(members["median"]))
            row["matched_pairs"] = int(members["matched_pairs"].sum())
            row["matched_shift"] = float(np.nanmedian(members["matched_shift"])) \
                if members["matched_shift"].notna().any() else np.nan
            rows.append(row)
    out = pd.concat([moves[~generated], pd.DataFrame(rows)], ignore_index=True)
    order = {d: i for i, d in enumerate(DIMENSIONS)}
    return out.sort_values([*PAIR, "dimension", "choice"], key=lambda s: s.map(order) if s.name ==
                           "dimension" else s, kind="stable", ignore_index=True)


def _summary_markdown(summ: pd.DataFrame, moves: pd.DataFrame, level: float, infl: pd.DataFrame) -> str:
    lines = ["# Specification curve summary", ""]
    cols = {"outcome": "outcome", "focal": "focal", "curve": "curve", "specs": "specs", "fitted": "fitted",
            "not_identified": "not identified", "failed": "failed", "baseline_estimate": "baseline",
            "baseline_percentile": "baseline percentile", "median": "median", "q25": "q25", "q75": "q75",
            "min": "min", "max": "max", "share_baseline_sign": "share with baseline's sign",
            "share_significant_dominant": f"share significant at {1 - level:.2g} (dominant sign)"}
    lines.append(tabulate(_blank(summ[list(cols)].rename(columns=cols)), headers="keys", tablefmt="github",
                          showindex=False, floatfmt=".4g", missingval=""))
    lines += ["", "## What each choice does to the estimate", "", MATCHED_NOTE, ""]
    if len(moves):
        lines.append(tabulate(_blank(collapse_families(moves)), headers="keys", tablefmt="github", showindex=False,
                              floatfmt=".4g", missingval=""))
    if len(infl):
        lines += ["", "## Leave-one-out influence: the dropped levels that move the estimate most", ""]
        top = infl[infl["rank"] <= 3]
        lines.append(tabulate(_blank(top), headers="keys", tablefmt="github", showindex=False, floatfmt=".4g",
                              missingval=""))
    return "\n".join(lines) + "\n"


def _focal(focal: str, curve: str) -> str:
    """The focal regressor as a table shows it, with its curve when that is not least squares."""
    return latex_escape(focal) if curve == DEFAULT_CURVE else f"{latex_escape(focal)} [{latex_escape(curve)}]"


def _summary_table(summ: pd.DataFrame, level: float) -> str:
    rows = []
    for r in summ.itertuples(index=False):
        rows.append(
            f"{latex_escape(r.outcome)} & {_focal(r.focal, r.curve)} & {r.specs} & {r.fitted} & "
            f"{r.not_identified} & {r.failed} & {_num(r.baseline_estimate)} & "
            f"{'' if not np.isfinite(r.baseline_percentile) else f'{r.baseline_percentile:.0f}'} & "
            f"{_num(r.median)} & [{_num(r.q25)}, {_num(r.q75)}] & [{_num(r.min)}, {_num(r.max)}] & "
            f"{_pct(r.share_baseline_sign)} & {_pct(r.share_significant_dominant)} \\\\")
    return "\n".join([
        r"\begin{tabular}{@{}llrrrrrrrccrr@{}}",
        r"\toprule",
        r"outcome & focal & specs & fitted & not id. & failed & baseline & pct. & median & IQR & range & "
        r"same sign & signif. \\",
        r"\midrule", *rows, r"\bottomrule", r"\end{tabular}", ""])


def _joint_table(joint: pd.DataFrame | None) -> str:
    if joint is None or joint.empty:
        return "No joint tests were run (\\texttt{joint\\_inference.draws} is 0).\n"
    names = {"median_estimate": "median estimate", "share_significant": "share significant, dominant sign",
             "stouffer_z": "Stouffer's $Z$"}
    rows = []
    for r in joint.itertuples(index=False):
        p = "" if not np.isfinite(r.p_value) else (f"$<{1 / r.draws:.3g}$" if r.p_value == 0 else f"{r.p_value:.3f}")
        obs = _pct(r.observed) if r.statistic == "share_significant" else _num(r.observed)
        focal = _focal(r.focal, getattr(r, "curve", DEFAULT_CURVE))  # joint tests written before curves had names
        rows.append(f"{latex_escape(r.outcome)} & {focal} & {names[r.statistic]} & {obs} & {p} "
                    f"& {r.draws} \\\\")
    return "\n".join([r"\begin{tabular}{@{}lllrrr@{}}", r"\toprule",
                      r"outcome & focal & statistic & observed & $p$ & draws \\", r"\midrule", *rows,
                      r"\bottomrule", r"\end{tabular}", ""])


def _shift(x: float, reference: bool) -> str:
    return "ref." if reference else ("" if not np.isfinite(x) else f"{x:+.4f}")


def _choices_table(moves: pd.DataFrame) -> str:
    rows = []
    for (outcome, focal, curve), part in moves.groupby(PAIR, sort=True):
        for dim, sub in part.groupby("dimension", sort=False):
            for i, r in enumerate(sub.itertuples(index=False)):
                rows.append(f"{latex_escape(outcome) if i == 0 else ''} & {_focal(focal, curve) if i == 0 else ''} & "
                            f"{latex_escape(dim) if i == 0 else ''} & {latex_escape(r.choice)} & {r.specs} & "
                            f"{_num(r.median)} & {r.matched_pairs if r.choice != r.reference else ''} & "
                            f"{_shift(r.matched_shift, r.choice == r.reference)} \\\\")
            rows.append(r"\addlinespace[2pt]")
    return "\n".join([r"\begin{longtable}{@{}lllp{4.2cm}rrrr@{}}", r"\toprule",
                      r"outcome & focal & dimension & choice & specs & median & pairs & shift \\", r"\midrule",
                      r"\endhead", *rows, r"\bottomrule", r"\end{longtable}", ""])


def _influence_table(infl: pd.DataFrame, top: int = 5) -> str:
    if infl.empty:
        return ""
    rows = []
    others = ["absorb", "clustering", "controls", "weights", "estimator"]
    for key, group in infl.groupby(["generator", "outcome", "focal", *others], sort=True):
        head = (f"{latex_escape(key[0])}: {latex_escape(key[1])} on {latex_escape(key[2])} "
                f"({', '.join(latex_escape(k) for k in key[3:])}); reference "
                f"{_num(group['reference'].iloc[0])} ({latex_escape(group['reference_sample'].iloc[0])})")
        rows.append(rf"\multicolumn{{4}}{{@{{}}l}}{{\emph{{{head}}}}} \\")
        for r in group.nsmallest(top, "rank").itertuples(index=False):
            rows.append(f"{r.rank} & {latex_escape(r.dropped)} & {_num(r.estimate)} & {r.change:+.4f} \\\\")
        rows.append(r"\addlinespace[3pt]")
    return "\n".join([r"\subsection*{Leave-one-out influence}",
                      f"The {top} dropped levels that move the estimate most, for each group of specifications "
                      "that differ only in the level dropped.", "",
                      r"{\footnotesize\begin{longtable}{@{}rlrr@{}}", r"\toprule",
                      r"rank & dropped & estimate & change \\", r"\midrule", r"\endhead", *rows,
                      r"\bottomrule", r"\end{longtable}}", ""])


def _spec_table(ledger: pd.DataFrame, level: float, significance: Significance) -> str:
    dims = [d for d in DIMENSIONS if d not in PAIR and ledger[d].nunique() > 1]
    wild = bool((ledger["wild_draws"] > 0).any())
    head = " & ".join(["id", *dims, "estimate", "s.e.", "$p$", *(["WCR $p$"] if wild else []), "$N$"])
    colspec = "@{}l" + "l" * len(dims) + "rrr" + ("r" if wild else "") + "r@{}"
    body = []
    order = ["outcome", "focal", "curve", *dims, "spec_id"]
    for (outcome, focal, curve), part in ledger.sort_values(order).groupby(PAIR, sort=True):
        span = 5 + len(dims) + int(wild)
        body.append(rf"\multicolumn{{{span}}}{{@{{}}l}}{{\textbf{{{latex_escape(outcome)} on "
                    rf"{_focal(focal, curve)}}}}} \\")
        for r in part.itertuples(index=False):
            cells = [r"\texttt{" + r.spec_id[:8] + "}"] + [latex_escape(getattr(r, d)) for d in dims]
            if r.status == STATUS_OK:
                marks = (latex_escape(significance.marks(r.p_value))
                         + (r"$^\dagger$" if r.inference_warning else ""))
                bold = r"\bfseries " if r.is_baseline else ""
                cells += [f"{bold}{_num(r.estimate)}{marks}", _num(r.std_error), _p(r.p_value),
                          *([_p(r.wild_p_value)] if wild else []), str(r.n_obs)]
            else:
                span_cells = 3 + int(wild)
                cells += [rf"\multicolumn{{{span_cells}}}{{c}}{{\emph{{{latex_escape(r.status.replace('_', ' '))}}}}}",
                          str(r.n_obs)]
            body.append(" & ".join(cells) + r" \\")
        body.append(r"\addlinespace[3pt]")
    return "\n".join([r"{\scriptsize\setlength{\tabcolsep}{3.5pt}", rf"\begin{{longtable}}{{{colspec}}}",
                      r"\toprule", head + r" \\", r"\midrule", r"\endfirsthead", r"\toprule", head + r" \\",
                      r"\midrule", r"\endhead", r"\bottomrule", r"\endfoot", *body, r"\end{longtable}}", ""])


_PREAMBLE = r"""% fegrid robustness appendix. Compiles on its own (pdflatex appendix.tex) or \input into a paper
% that loads booktabs, longtable, graphicx, siunitx and threeparttable. Set \fegriddir to this folder
% when inputting from elsewhere.
\makeatletter
\ifx\@onlypreamble\@notprerr
  \def\fegrid@begin{}\def\fegrid@end{}%
\else
  \documentclass[11pt]{article}
  \usepackage[margin=2.2cm]{geometry}
  \usepackage{booktabs,longtable,graphicx,siunitx,threeparttable}
  \def\fegrid@begin{\begin{document}}\def\fegrid@end{\end{document}}%
\fi
\makeatother
\providecommand{\fegriddir}{}
\csname fegrid@begin\endcsname
"""


#: The appendix's page: US letter with 2.2 cm margins; a curve figure gets a float page of its own,
#: at most this share of the text height (the rest holds its caption).
TEXT_WIDTH_IN = 8.5 - 2 * 2.2 / 2.54
TEXT_HEIGHT_IN = 11.0 - 2 * 2.2 / 2.54
FIGURE_HEIGHT_SHARE = 0.9


def render_appendix(grid: Grid, ledger: pd.DataFrame, joint: pd.DataFrame | None, figures: Sequence[str],
                    out: str | Path, *, draws: int = 0, seed: int | None = None,
                    resample: str | None = None, tables: Sequence[str] = (), sections: Sequence[str] = ()) -> Path:
    """Write ``appendix.tex``: notes, summary, joint tests, figures, choices, every specification."""
    level = grid.level
    significance = Significance.from_config(grid.raw)
    summ = curve_summary(ledger, level)
    moves = choice_medians(ledger)
    counts = ledger["status"].value_counts()
    notes = (
        "Each row of the grid is one regression of the outcome on the focal regressor, the controls and the "
        "absorbed fixed effects, estimated by the within (fixed-effects) estimator: variables are demeaned by "
        "alternating projections (Gaure 2013; relative tolerance "
        f"{grid.tolerance:g}) and the demeaned outcome is regressed on the demeaned regressors. "
        "Observations alone in a fixed-effect group (singletons) are "
        + ("kept. " if grid.keep_singletons else "dropped, repeatedly until none remain (Correia 2015). ")
        + "Rows with missing values in a specification's own variables are dropped for that specification only. "
        "Standard errors: \\emph{homoskedastic} uses $s^2(X'X)^{-1}$ with $s^2=e'e/(N-K)$; \\emph{hc1} "
        "(heteroskedasticity-robust, MacKinnon \\& White 1985) is scaled "
        "by $N/(N-K)$; clustered standard errors are scaled by $G/(G-1)\\cdot(N-1)/(N-K)$, where fixed effects "
        "nested in the cluster variable do not count in $K$ (Cameron \\& Miller 2015); two-way clustering is "
        "$V_1+V_2-V_{12}$ (Cameron, Gelbach \\& Miller 2011), with negative eigenvalues set to zero when needed. "
        "$K$ counts the regressors and the rank of the absorbed effects. Tests and intervals use the $t$ "
        "distribution with $N-K$ degrees of freedom, or $G-1$ when clustered ($\\min(G_1,G_2)-1$ for two-way). "
        f"Confidence intervals are at {level:.0%}; ".replace("%", r"\%")
        + f"significance marks: {latex_escape(significance.note()).replace('p <', '$p<$')}. "
        + f"The grid holds {len(ledger)} specifications: {int(counts.get('ok', 0))} fitted, "
        f"{int(counts.get('not_identified', 0))} not identified (the focal regressor is absorbed by the fixed "
        f"effects or collinear with the controls) and {int(counts.get('failed', 0))} failed. "
    )
    if draws:
        notes += (
            f"Joint tests (Simonsohn, Simmons \\& Nelson 2020) impose the null in each specification, draw "
            f"{draws} bootstrap samples of whole levels of \\texttt{{{latex_escape(resample)}}} (seed {seed}; the "
            "same draws for every specification) and report the share of draws "
            "whose median estimate, share of significant estimates with the dominant sign, and Stouffer's $Z$ "
            f"are at least as extreme as observed; {latex_escape(method_text(grid.joint_method))}. "
        )
        caution = shared_cluster_caution(grid, ledger["clustering"].astype(str))
        if caution:
            notes += f"Caution: {latex_escape(caution)} "
    wild = ledger[ledger["wild_draws"] > 0]
    if len(wild):
        notes += (
            f"For {len(wild)} specifications the ledger adds a wild cluster restricted bootstrap (WCR; Cameron, "
            "Gelbach \\& Miller 2008) $p$-value, with "
            + ", ".join(sorted({f"{w} weights" for w in wild["wild_weights"]}))
            + " (Webb 2023 for the six-point weights), and its confidence interval by test inversion; every "
            "Rademacher sign vector is enumerated when $2^G$ does not exceed the draws. "
        )
    warned = int((ledger["inference_warning"].astype(str) != "").sum())
    if warned:
        notes += (f"$^\\dagger$ marks the {warned} specifications whose clustered inference may be fragile (few "
                  "clusters, one dominant cluster, or few treated clusters; MacKinnon \\& Webb 2017); the "
                  "ledger's \\texttt{inference\\_warning} says which. ")
    notes += ("Fixed effects remove only what is fixed within their groups, and a stable curve is not proof of "
              "causality: every specification can share the same flaw.")
    figure_blocks = []
    for (outcome, focal, curve), path in zip(sorted({tuple(x) for x in ledger[PAIR].to_numpy().tolist()}), figures):
        figure_blocks.append("\n".join([
            r"\begin{figure}[p]\centering",
            rf"\includegraphics[width=\linewidth,height={FIGURE_HEIGHT_SHARE}\textheight,keepaspectratio]"
            rf"{{\fegriddir {path}}}",
            rf"\caption{{Specification curve: {latex_escape(outcome)} on {_focal(focal, curve)}. Top: estimates "
            rf"sorted, with {level:.0%} confidence intervals, coloured when significant; the baseline is marked. "
            r"Bottom: the choices each specification uses.}".replace("%", r"\%"),
            r"\end{figure}"]))
    doc = [
        _PREAMBLE,
        rf"\section*{{Robustness appendix: {latex_escape(grid.run_name)}}}",
        r"\paragraph{Notes.} " + notes,
        "", *tables,
        "", r"\begin{table}[ht]\centering\footnotesize",
        r"\caption{The specification curve in numbers: counts, the baseline's estimate and percentile in the curve, "
        r"the median, interquartile range and range of the fitted estimates, the share with the baseline's sign and "
        r"the share significant with the dominant sign.}",
        r"\resizebox{\linewidth}{!}{%", _summary_table(summ, level).rstrip("\n") + "}", r"\end{table}",
        "", r"\begin{table}[ht]\centering\footnotesize",
        r"\caption{Joint tests across the curve (bootstrap under the null).}",
        _joint_table(joint), r"\end{table}", "",
        *figure_blocks, "", *sections, "", r"\clearpage",
        r"\subsection*{What each choice does to the estimate}",
        MATCHED_NOTE_TEX, "",
        r"{\footnotesize", _choices_table(collapse_families(moves)), "}",
        _influence_table(influence(ledger)),
        r"\subsection*{Every specification}",
        r"Grouped by outcome and focal regressor; the baseline's estimate is in bold; ids are the first "
        r"8 characters of the ledger's \texttt{spec\_id}.",
        "", _spec_table(ledger, level, significance),
        r"\csname fegrid@end\endcsname", "",
    ]
    return write_text(out, "\n".join(doc))


def compile_latex(tex: str | Path, pdf: str | Path) -> Path:
    """Compile ``tex`` with pdflatex (twice, for longtable) in a scratch folder; write ``pdf``.

    The scratch folder is a copy of the tex file's folder contents that the document uses, so no
    auxiliary file is left beside the appendix and a failed compile leaves no PDF.
    """
    exe = pdflatex()
    if exe is None:
        raise RuntimeError("pdflatex is not installed (Debian: texlive-latex-recommended)")
    tex = Path(tex).resolve()
    # identical inputs give identical bytes: pdfTeX takes its dates and the file's /ID from
    # SOURCE_DATE_EPOCH (the user's if set, else the epoch itself)
    env = {**os.environ, "SOURCE_DATE_EPOCH": os.environ.get("SOURCE_DATE_EPOCH", "0"), "FORCE_SOURCE_DATE": "1"}
    # the file identifier (/ID) would otherwise hash the scratch folder's random name
    trailer_id = hashlib.sha256(tex.read_bytes()).hexdigest()[:32]
    with tempfile.TemporaryDirectory() as tmp:
        for _ in range(2):
            proc = subprocess.run([exe, "-interaction=nonstopmode", "-halt-on-error", f"-output-directory={tmp}",
                                   f"-jobname={tex.stem}", rf"\pdftrailerid{{{trailer_id}}}\input{{{tex.name}}}"],
                                  cwd=tex.parent, capture_output=True, text=True, env=env)
            if proc.returncode != 0:
                raise RuntimeError("pdflatex failed:\n" + proc.stdout[-4000:])
        built = Path(tmp) / (tex.stem + ".pdf")
        data = built.read_bytes()
    from .store import atomic_write

    return atomic_write(pdf, lambda fh: fh.write(data))


def figure_names(ledger: pd.DataFrame) -> list[str]:
    """Relative paths of the curve figures (PDF), in the order of the sorted outcome x focal pairs."""
    pairs = sorted({tuple(x) for x in ledger[PAIR].to_numpy().tolist()})
    return [f"figures/curve-{pair_slug(o, f, c)}.pdf" for o, f, c in pairs]

