"""Results tables a paper can print: a few named specifications side by side.

One table model (:class:`ResultsTable`) is built from the ledger and rendered three ways: LaTeX
(booktabs rules, decimal alignment with siunitx, notes in a threeparttable), Markdown and HTML.
A table is declared in the config's ``tables`` block; each column names one specification, either
by its spec id or by the choices that differ from the baseline (``{absorb: orchard}`` is the
baseline with orchard effects only). Rows: the focal coefficient with its standard error in
parentheses beneath, indicators for the controls asked for (``show_controls``; without it, a row naming
each column's controls) and for each absorbed term, the
standard errors and sample of each column, then the number of observations, of clusters, the
within R-squared and the outcome's mean and SD in the estimation sample.

Significance marks follow ``significance`` in the config (default: ``*`` p < 0.10, ``**`` p < 0.05,
``***`` p < 0.01, the common convention of economics journals; common practice), stated in every
table's notes. ``labels`` maps column and choice names to the text shown (the ledger keeps the raw
names).

>>> Significance.from_config({}).marks(0.03), Significance.from_config({}).note()
('**', '* p < 0.1, ** p < 0.05, *** p < 0.01')
>>> Significance.from_config({"significance": {"levels": [], "symbols": []}}).note()
'no significance marks'
"""

from __future__ import annotations

import html
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .absorb import term_label
from .defaults import DEFAULTS
from .errors import ConfigError
from .ledger import DIMENSIONS, STATUS_OK
from .store import write_text

__all__ = ["Significance", "ResultsTable", "TableRow", "build_table", "table_specs", "write_tables", "grid_tables",
           "latex_table", "markdown_table", "html_table", "inference_text", "TABLE_FORMATS"]

#: Every format a results table is written in, by file ending.
TABLE_FORMATS = ("tex", "md", "html")

_LATEX_SPECIAL = {"&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_", "{": r"\{", "}": r"\}",
                  "~": r"\textasciitilde{}", "^": r"\textasciicircum{}", "\\": r"\textbackslash{}",
                  "<": r"\textless{}", ">": r"\textgreater{}"}


def _tex(text: object) -> str:
    return "".join(_LATEX_SPECIAL.get(ch, ch) for ch in str(text))


@dataclass(frozen=True)
class Significance:
    """Significance marks: thresholds (descending) and their symbols; empty for no marks."""

    levels: tuple[float, ...]
    symbols: tuple[str, ...]

    @staticmethod
    def from_config(raw: Mapping[str, Any]) -> Significance:
        body = raw.get("significance") or {}
        levels = tuple(float(x) for x in body.get("levels", DEFAULTS["significance.levels"]))
        symbols = tuple(str(s) for s in body.get("symbols", DEFAULTS["significance.symbols"]))
        if len(levels) != len(symbols):
            raise ConfigError(f"significance: {len(levels)} levels but {len(symbols)} symbols; give one symbol "
                              "per level.")
        if list(levels) != sorted(levels, reverse=True) or any(not 0 < x < 1 for x in levels):
            raise ConfigError("significance.levels must lie between 0 and 1, from the largest to the smallest "
                              "(e.g. [0.10, 0.05, 0.01]).")
        return Significance(levels, symbols)

    def marks(self, p: float) -> str:
        """The symbol of the smallest threshold that ``p`` is below ("" when none, or p is missing)."""
        if p is None or not np.isfinite(p):
            return ""
        mark = ""
        for level, symbol in zip(self.levels, self.symbols):
            if p < level:
                mark = symbol
        return mark

    def note(self) -> str:
        if not self.levels:
            return "no significance marks"
        return ", ".join(f"{s} p < {level:g}" for level, s in zip(self.levels, self.symbols))


@dataclass(frozen=True)
class TableRow:
    """One row: a label and one cell per column; ``kind`` tells the renderers how to set it."""

    label: str
    cells: tuple[str, ...]
    kind: str  # "coef" (numbers with marks), "se" (in parentheses), "text", "count", "stat" (decimals)
    group: str  # rows of one group sit between rules


@dataclass(frozen=True)
class ResultsTable:
    """A results table, independent of its format."""

    name: str
    caption: str
    outcomes: tuple[str, ...]
    titles: tuple[str, ...]
    rows: tuple[TableRow, ...]
    notes: tuple[str, ...]
    spec_ids: tuple[str, ...]
    marks: tuple[str, ...]  # every symbol in use, for the LaTeX column width


def table_specs(ledger: pd.DataFrame, body: Mapping[str, Any], *, name: str) -> list[pd.Series]:
    """The ledger row of each column of table ``name`` (a spec id, or the baseline with some choices changed)."""
    baseline = ledger[ledger["is_baseline"]]
    columns = body.get("columns")
    if not columns:  # the baseline, then the baseline with each other absorbed-effects choice
        columns = [{}]
        if not baseline.empty:
            base = baseline.iloc[0]
            same = np.ones(len(ledger), dtype=bool)
            for d in DIMENSIONS:
                if d != "absorb":
                    same &= (ledger[d].astype(str) == str(base[d])).to_numpy()
            others = [a for a in dict.fromkeys(ledger.loc[same, "absorb"].astype(str)) if a != str(base["absorb"])]
            columns += [{"absorb": a} for a in others[:5]]
    out = []
    for i, column in enumerate(columns, 1):
        where = f"tables.{name}.columns[{i}]"
        if "spec_id" in column:
            rows = ledger[ledger["spec_id"] == str(column["spec_id"])]
            if len(rows) != 1:
                raise ConfigError(f"{where}: no specification has the spec id '{column['spec_id']}'.")
            out.append(rows.iloc[0])
            continue
        if baseline.empty:
            raise ConfigError(f"{where}: the grid has no baseline to start from; name the column's spec_id.")
        wanted = {d: str(baseline.iloc[0][d]) for d in DIMENSIONS}
        unknown = sorted(set(column) - set(DIMENSIONS))
        if unknown:
            raise ConfigError(f"{where}: unknown dimension(s) {', '.join(unknown)}; a column names spec_id or "
                              f"choices of {', '.join(DIMENSIONS)}.")
        wanted.update({d: str(v) for d, v in column.items()})
        mask = np.ones(len(ledger), dtype=bool)
        for d, v in wanted.items():
            mask &= (ledger[d].astype(str) == v).to_numpy()
        rows = ledger[mask]
        if len(rows) != 1:
            changed = ", ".join(f"{d}: {v}" for d, v in column.items()) or "the baseline"
            raise ConfigError(f"{where} ({changed}, other choices as in the baseline) names no specification of "
                              "the grid (an excluded combination, or a misspelt choice).")
        out.append(rows.iloc[0])
    return out


def _fmt(x: float, digits: int) -> str:
    return "" if x is None or not np.isfinite(x) else f"{x:.{digits}f}"


def _count(x: float) -> str:
    return "" if x is None or not np.isfinite(x) or x <= 0 else f"{int(x):,}"


def _controls_text(columns: Sequence[str], dropped: str, label: Any) -> str:
    """A column's controls in words, each dropped one with the ledger's reason: ``hours, exper (absorbed)``."""
    why = {}
    for item in filter(None, (part.strip() for part in dropped.split(";"))):
        name, _, reason = item.rpartition(" (")
        if name and reason.endswith(")"):
            why[name] = reason[:-1]
    return ", ".join(label(x) + (f" ({why[x]})" if x in why else "") for x in columns) or "none"


def build_table(name: str, body: Mapping[str, Any], ledger: pd.DataFrame, *, absorb_terms: Mapping[str, Sequence[str]],
                inference_text: Mapping[str, str], labels: Mapping[str, str],
                significance: Significance, control_columns: Mapping[str, Sequence[str]] | None = None
                ) -> ResultsTable:
    """The table model of ``tables.<name>`` (see the module docstring). Without ``show_controls``, one row
    names each column's controls (``control_columns``: the columns of each control set, by name)."""
    def label(x: str) -> str:
        return str(labels.get(x, x))

    cols = table_specs(ledger, body, name=name)
    digits = int(body.get("digits", DEFAULTS["tables.digits"]))
    k = len(cols)
    rows: list[TableRow] = []
    for focal in dict.fromkeys(str(c["focal"]) for c in cols):
        est, se = [], []
        for c in cols:
            if str(c["focal"]) != focal:
                est.append("")
                se.append("")
            elif c["status"] != STATUS_OK:
                est.append("n.i." if c["status"] == "not_identified" else "failed")
                se.append("")
            else:
                est.append(_fmt(c["estimate"], digits) + significance.marks(float(c["p_value"])))
                se.append(f"({_fmt(c['std_error'], digits)})")
        rows += [TableRow(label(focal), tuple(est), "coef", "coefficients"),
                 TableRow("", tuple(se), "se", "coefficients")]
    def holds(c: Any, control: str) -> bool:  # a control set's columns (a generated set's name lists them)
        name = str(c["controls"])
        return control in (control_columns.get(name, ()) if control_columns is not None else name.split("+"))

    for control in body.get("show_controls", []):
        cells = tuple("Yes" if holds(c, control) else "No" for c in cols)
        rows.append(TableRow(f"{label(control)} (control)", cells, "text", "controls"))
    if not body.get("show_controls") and control_columns is not None:  # which controls, in words
        rows.append(TableRow("Controls", tuple(_controls_text(control_columns.get(str(c["controls"]), ()),
                                                              str(c.get("controls_dropped") or ""), label)
                                               for c in cols), "text", "controls"))
    terms = list(dict.fromkeys(t for c in cols for t in absorb_terms.get(str(c["absorb"]), ())))
    for term in terms:
        cells = tuple("Yes" if term in absorb_terms.get(str(c["absorb"]), ()) else "No" for c in cols)
        rows.append(TableRow(f"{label(term)} effects", cells, "text", "effects"))
    rows.append(TableRow("Clustering", tuple(label(inference_text.get(str(c["clustering"]), str(c["clustering"])))
                                                   for c in cols), "text", "design"))
    for dim, title in (("sample", "Sample"), ("weights", "Weights"), ("estimator", "Estimator")):
        if dim in cols[0] and (len({str(c[dim]) for c in cols}) > 1 or dim == "sample"):
            rows.append(TableRow(title, tuple(label(str(c[dim])) for c in cols), "text", "design"))
    rows += [
        TableRow("Observations", tuple(_count(float(c["n_obs"])) for c in cols), "count", "stats"),
        TableRow("Clusters", tuple(_count(float(c["n_clusters"])) for c in cols), "count", "stats"),
        TableRow("Within R-squared", tuple(_fmt(float(c["within_r2"]), 3) for c in cols), "stat", "stats"),
        *([TableRow("First-stage F (effective)", tuple(_fmt(float(c["effective_f"]), 2) for c in cols), "stat",
                    "stats")] if "effective_f" in cols[0] and any(np.isfinite(float(c["effective_f"])) for c in cols)
          else []),
        *[TableRow(title, tuple(_fmt(float(c[col]), 3) for c in cols), "stat", "stats")
          for col, title in (("pretrend_p_value", "Pre-trend test, p-value"),
                             ("already_treated_weight", "Weight on already-treated controls"))
          if col in cols[0] and any(np.isfinite(float(c[col])) for c in cols)],
        TableRow("Mean of outcome", tuple(_fmt(float(c["outcome_mean"]), digits) for c in cols), "stat", "stats"),
        TableRow("SD of outcome", tuple(_fmt(float(c["outcome_sd"]), digits) for c in cols), "stat", "stats"),
    ]
    notes = [
        f"Each column is one specification of the grid; the cell is the focal coefficient with its standard error in "
        "parentheses (clustered by the variables named in the Clustering row; none: heteroskedasticity-robust HC1 "
        f"or homoskedastic). Significance: {significance.note()} (two-sided t tests with the ledger's degrees of "
        "freedom). Mean and SD of the outcome in each column's estimation sample. Fixed effects remove only what is "
        "fixed within their groups.",
    ]
    if body.get("notes"):
        notes.append(str(body["notes"]))
    notes.append("Spec ids: " + "; ".join(f"({i}) {c['spec_id']}" for i, c in enumerate(cols, 1)) + ".")
    titles = tuple(str(t) for t in body.get("titles", [])) or tuple(f"({i})" for i in range(1, k + 1))
    if len(titles) != k:
        raise ConfigError(f"tables.{name}.titles has {len(titles)} titles for {k} columns.")
    focals = ", ".join(label(f) for f in dict.fromkeys(str(c["focal"]) for c in cols))
    caption = str(body.get("caption") or f"Estimates of {focals}")
    return ResultsTable(name=name, caption=caption, outcomes=tuple(label(str(c["outcome"])) for c in cols),
                        titles=titles, rows=tuple(rows), notes=tuple(notes),
                        spec_ids=tuple(str(c["spec_id"]) for c in cols),
                        marks=tuple(s for s in significance.symbols))


def latex_table(table: ResultsTable) -> str:
    r"""A ``table`` environment: booktabs rules, siunitx ``S`` columns, notes in a threeparttable.

    Needs ``\usepackage{booktabs,siunitx,threeparttable}`` and defines ``\fegridsym`` (the marks)."""
    integer = 1
    for row in table.rows:
        for text in row.cells if row.kind in ("coef", "stat") else ():
            try:
                value = float(text.rstrip("".join(set("".join(table.marks)))).replace(",", ""))
            except ValueError:
                continue
            integer = max(integer, len(str(int(abs(value)))) if np.isfinite(value) else 1)
    post = max(table.marks, key=len, default="")
    spec = (f"S[table-format=-{integer}.4,table-space-text-post={{\\fegridsym{{{_tex(post)}}}}}]"
            if post else f"S[table-format=-{integer}.4]")
    k = len(table.titles)

    def cell(row: TableRow, text: str) -> str:
        if not text:
            return "{}"
        if row.kind == "coef":
            number = text.rstrip("".join(set("".join(table.marks))))
            mark = text[len(number):]
            try:
                float(number)
            except ValueError:
                return "{" + _tex(text) + "}"
            return number + (f"\\fegridsym{{{_tex(mark)}}}" if mark else "")
        if row.kind == "stat" and text.replace(".", "").replace("-", "").isdigit():
            return text
        return "{" + _tex(text) + "}"

    lines = [
        r"% written by fegrid from the ledger; needs \usepackage{booktabs,siunitx,threeparttable}",
        r"\providecommand{\fegridsym}[1]{\ensuremath{^{#1}}}",
        r"\begin{table}[htbp]\centering\small\setlength{\tabcolsep}{4pt}",
        r"\begin{threeparttable}",
        rf"\caption{{{_tex(table.caption)}}}\label{{tab:fegrid-{table.name}}}",
        rf"\begin{{tabular}}{{l*{{{k}}}{{{spec}}}}}",
        r"\toprule",
        " & " + " & ".join("{" + _tex(t) + "}" for t in table.titles) + r" \\",
        "Outcome & " + " & ".join("{" + _tex(o) + "}" for o in table.outcomes) + r" \\",
        r"\midrule",
    ]
    group = table.rows[0].group if table.rows else ""
    for row in table.rows:
        if row.group != group:
            lines.append(r"\midrule")
            group = row.group
        lines.append(_tex(row.label) + " & " + " & ".join(cell(row, c) for c in row.cells) + r" \\")
    lines += [r"\bottomrule", r"\end{tabular}", r"\begin{tablenotes}[flushleft]\footnotesize"]
    lines += [rf"\item {_tex(n)}" for n in table.notes]
    lines += [r"\end{tablenotes}", r"\end{threeparttable}", r"\end{table}", ""]
    return "\n".join(lines)


def markdown_table(table: ResultsTable) -> str:
    """A GitHub-flavoured Markdown table with the notes beneath."""
    def esc(text: str) -> str:  # what Markdown would read as markup: table bars, HTML tags, emphasis
        return (text.replace("\\", "\\\\").replace("|", r"\|").replace("<", "&lt;").replace(">", "&gt;")
                .replace("*", r"\*").replace("_", r"\_"))

    lines = [f"**{esc(table.caption)}**", "",
             "| | " + " | ".join(esc(t) for t in table.titles) + " |",
             "| --- | " + " | ".join("---:" for _ in table.titles) + " |",
             "| Outcome | " + " | ".join(esc(o) for o in table.outcomes) + " |"]
    lines += [f"| {esc(r.label)} | " + " | ".join(esc(c) for c in r.cells) + " |" for r in table.rows]
    lines += ["", "Notes: " + " ".join(esc(n) for n in table.notes)]
    return "\n".join(lines) + "\n"


def html_table(table: ResultsTable) -> str:
    """An HTML fragment: a ``<table>`` with its caption, notes in the footer."""
    e = html.escape
    k = len(table.titles)
    out = [f'<table class="fegrid-table" id="fegrid-{e(table.name)}">', f"<caption>{e(table.caption)}</caption>",
           "<thead>", "<tr><th></th>" + "".join(f"<th>{e(t)}</th>" for t in table.titles) + "</tr>",
           "<tr><th>Outcome</th>" + "".join(f"<th>{e(o)}</th>" for o in table.outcomes) + "</tr>", "</thead>",
           "<tbody>"]
    group = table.rows[0].group if table.rows else ""
    for row in table.rows:
        style = ' class="fegrid-rule"' if row.group != group else ""
        group = row.group
        out.append(f"<tr{style}><th scope=\"row\">{e(row.label)}</th>"
                   + "".join(f'<td style="text-align:right">{e(c)}</td>' for c in row.cells) + "</tr>")
    out += ["</tbody>", "<tfoot>"]
    out += [f'<tr><td colspan="{k + 1}">{e(n)}</td></tr>' for n in table.notes]
    out += ["</tfoot>", "</table>", ""]
    return "\n".join(out)


def write_tables(tables: Mapping[str, ResultsTable], paths: Mapping[str, Mapping[str, Path]]) -> list[Path]:
    """Write every table in every format (``paths[name][ending]``)."""
    render = {"tex": latex_table, "md": markdown_table, "html": html_table}
    return [write_text(paths[name][ending], render[ending](table)) for name, table in tables.items()
            for ending in TABLE_FORMATS]


def inference_text(kind: str, by: Sequence[Sequence[str]]) -> str:
    """How a column's standard errors are computed, in words."""
    dims = [" x ".join(d) for d in by]
    return {"homoskedastic": "none (homosk.)", "hc1": "none (HC1)",
            "clustered": dims[0] if dims else "clustered",
            "two_way_clustered": " & ".join(dims)}.get(kind, kind)


def grid_tables(grid: Any, ledger: pd.DataFrame) -> dict[str, ResultsTable]:
    """Every table the config declares, built from ``ledger`` (``grid``: a :class:`fegrid.grid.Grid`)."""
    raw = grid.raw
    terms = {name: tuple(term_label(t) for t in choice) for name, choice in grid.absorb.items()}
    ses = {name: inference_text(inf.kind, inf.by) for name, inf in grid.clustering.items()}
    significance = Significance.from_config(raw)
    labels = dict(raw.get("labels") or {})
    return {name: build_table(name, body, ledger, absorb_terms=terms, inference_text=ses, labels=labels,
                              significance=significance, control_columns=grid.controls)
            for name, body in sorted((raw.get("tables") or {}).items())}
