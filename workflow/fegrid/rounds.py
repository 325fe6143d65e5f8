"""Referee rounds: compare two ledgers, and freeze a run's reports into a read-only round folder."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import stat
from dataclasses import dataclass
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd
from tabulate import tabulate

from .defaults import DEFAULTS
from .errors import FegridError
from .ledger import DEFAULT_CURVE, DIMENSIONS, PAIR, STATUS_OK, read_ledger
from .report import latex_escape
from .store import RunPaths, write_json, write_text

__all__ = ["LedgerComparison", "compare_ledgers", "load_ledger", "archive_round", "ROUNDS_FOLDER"]

ROUNDS_FOLDER = "rounds"


def load_ledger(where: str | Path) -> tuple[pd.DataFrame, dict | None, Path]:
    """A ledger (CSV or Parquet file, or a run or round folder holding one) and its manifest."""
    path = Path(where)
    if path.is_dir():
        for name in ("ledger.parquet", "ledger.csv"):
            if (path / name).is_file():
                path = path / name
                break
        else:
            raise FegridError(f"The folder '{where}' holds no ledger.csv or ledger.parquet.")
    if not path.is_file():
        raise FegridError(f"There is no ledger at '{where}'.")
    ledger = read_ledger(path)
    manifest_path = path.parent / "manifest.json"
    manifest = json.loads(manifest_path.read_text()) if manifest_path.is_file() else None
    return ledger, manifest, path


@dataclass
class LedgerComparison:
    """What moved between two ledgers, matched by spec id."""

    added: pd.DataFrame
    removed: pd.DataFrame
    unchanged: pd.DataFrame
    changed: pd.DataFrame
    curve: pd.DataFrame
    data_changed: bool | None
    notes: list[str]

    def counts(self) -> dict[str, int]:
        return {"added": len(self.added), "removed": len(self.removed), "unchanged": len(self.unchanged),
                "changed": len(self.changed)}


def _curve_rows(old: pd.DataFrame, new: pd.DataFrame, alpha: float) -> pd.DataFrame:
    """How each outcome x focal curve moved: one row per pair and ledger (curves are never pooled:
    two focal regressors' estimates are on different scales)."""
    rows = []
    pairs = sorted({tuple(p) for led in (old, new) for p in led[PAIR].astype(str).to_numpy().tolist()})
    for outcome, focal, curve in pairs:
        for name, led in (("old", old), ("new", new)):
            part = led[(led["outcome"].astype(str) == outcome) & (led["focal"].astype(str) == focal)
                       & (led["curve"].astype(str) == curve)]
            ok = part[part["status"] == STATUS_OK]
            base = part[part["is_baseline"]]
            rows.append({
                "outcome": outcome, "focal": focal, "curve": curve, "ledger": name,
                "fitted": float(len(ok)),
                "median": float(ok["estimate"].median()) if len(ok) else np.nan,
                "share_significant": float((ok["p_value"] < alpha).mean()) if len(ok) else np.nan,
                "baseline_estimate": float(base["estimate"].iloc[0]) if len(base) else np.nan,
                "baseline_std_error": float(base["std_error"].iloc[0]) if len(base) else np.nan,
            })
    return pd.DataFrame(rows, columns=["outcome", "focal", "curve", "ledger", "fitted", "median", "share_significant",
                                       "baseline_estimate", "baseline_std_error"])


def compare_ledgers(old: pd.DataFrame, new: pd.DataFrame, *, tolerance: float = 1e-8,
                    level: float = DEFAULTS["confidence_level"], old_manifest: dict | None = None,
                    new_manifest: dict | None = None) -> LedgerComparison:
    """Match two ledgers by spec id.

    A specification present in both has *changed* when its status changed, its estimate or standard
    error moved by more than ``tolerance`` (relative to the old value's magnitude, at least 1e-300),
    or its significance at ``1 - level`` flipped; otherwise it is *unchanged*.
    """
    alpha = 1.0 - level
    both = old.merge(new, on="spec_id", how="inner", suffixes=("_old", "_new"))
    added = new[~new["spec_id"].isin(old["spec_id"])]
    removed = old[~old["spec_id"].isin(new["spec_id"])]

    def moved(col: str) -> pd.Series:
        a, b = both[f"{col}_old"].astype(float), both[f"{col}_new"].astype(float)
        scale = np.maximum(np.abs(a), 1e-300)
        diff = (np.abs(b - a) / scale > tolerance) & ~(a.isna() & b.isna())
        return diff | (a.isna() != b.isna())

    status = both["status_old"] != both["status_new"]
    sig_old, sig_new = both["p_value_old"] < alpha, both["p_value_new"] < alpha
    flipped = (sig_old != sig_new) & (both["status_old"] == STATUS_OK) & (both["status_new"] == STATUS_OK)
    est, se = moved("estimate"), moved("std_error")
    reasons = []
    for s, e, v, f in zip(status, est, se, flipped):
        reasons.append(", ".join(r for r, on in (("status", s), ("estimate", e), ("std. error", v),
                                                ("significance flipped", f)) if on))
    both = both.assign(what_changed=reasons)
    is_changed = both["what_changed"] != ""
    keep = ["spec_id", *[f"{d}_new" for d in DIMENSIONS if f"{d}_new" in both], "status_old", "status_new",
            "estimate_old", "estimate_new", "std_error_old", "std_error_new", "p_value_old", "p_value_new",
            "what_changed"]
    changed = both.loc[is_changed, keep].rename(columns={f"{d}_new": d for d in DIMENSIONS})
    unchanged = both.loc[~is_changed, ["spec_id"]]
    curve = _curve_rows(old, new, alpha) if {"outcome", "focal"} <= set(old) & set(new) else pd.DataFrame()
    notes = []
    data_changed = None
    if old_manifest and new_manifest:
        data_changed = old_manifest["data"]["sha256"] != new_manifest["data"]["sha256"]
        if data_changed:
            notes.append(f"The data file changed: SHA-256 {old_manifest['data']['sha256'][:12]}... -> "
                         f"{new_manifest['data']['sha256'][:12]}...")
        else:
            notes.append(f"The data file is the same (SHA-256 {new_manifest['data']['sha256'][:12]}...).")
        if old_manifest.get("config_sha256") != new_manifest.get("config_sha256"):
            notes.append("The config changed.")
    else:
        notes.append("No manifest beside one of the ledgers: whether the data changed is not known.")
    base_old, base_new = old[old["is_baseline"]], new[new["is_baseline"]]
    if len(base_old) and len(base_new) and base_old["spec_id"].iloc[0] != base_new["spec_id"].iloc[0]:
        notes.append(f"The baseline is another specification: {base_old['spec_id'].iloc[0]} -> "
                     f"{base_new['spec_id'].iloc[0]}.")
    return LedgerComparison(added, removed, unchanged, changed.reset_index(drop=True), curve, data_changed, notes)


def _fmt(x: float) -> str:
    return "" if x is None or not np.isfinite(x) else f"{x:.4g}"


def comparison_text(cmp: LedgerComparison, *, fmt: str = "simple", top: int = 20) -> str:
    """Terminal (``simple``) or Markdown (``github``) report of a comparison."""
    counts = cmp.counts()
    out = [tabulate([list(counts.values())], headers=list(counts), tablefmt=fmt)]
    out += ["", "How each curve moved (per outcome and focal regressor):",
            tabulate(cmp.curve.map(lambda v: _fmt(v) if isinstance(v, float) else v), headers="keys",
                     tablefmt=fmt, showindex=False)]
    out += [""] + [f"- {n}" for n in cmp.notes]
    if len(cmp.changed):
        shown = cmp.changed.head(top)
        cols = ["spec_id", *[d for d in DIMENSIONS if d in shown], "estimate_old", "estimate_new", "what_changed"]
        first = f", first {top}" if len(cmp.changed) > top else ""
        out += ["", f"Changed specifications ({len(cmp.changed)}{first}):",
                tabulate(shown[cols], headers="keys", tablefmt=fmt, showindex=False, floatfmt=".4g")]
    if len(cmp.added):
        out += ["", f"Added: {len(cmp.added)} specifications, e.g. " + ", ".join(cmp.added["spec_id"].head(5))]
    if len(cmp.removed):
        out += ["", f"Removed: {len(cmp.removed)} specifications, e.g. " + ", ".join(cmp.removed["spec_id"].head(5))]
    return "\n".join(out) + "\n"


def comparison_latex(cmp: LedgerComparison) -> str:
    """A booktabs table for a response letter: counts, then how the curve and the baseline moved."""
    c = cmp.counts()
    rows = [
        ("Specifications added / removed", f"{c['added']} / {c['removed']}", ""),
        ("Specifications changed / unchanged", f"{c['changed']} / {c['unchanged']}", ""),
    ]
    for (outcome, focal, curve), part in cmp.curve.groupby(PAIR, sort=True):
        old, new = part.set_index("ledger").loc["old"], part.set_index("ledger").loc["new"]
        pair = f"{outcome} on {focal}" + ("" if curve == DEFAULT_CURVE else f" [{curve}]")
        rows += [
            (f"{pair}: fitted specifications", f"{old['fitted']:.0f}", f"{new['fitted']:.0f}"),
            (f"{pair}: median estimate", _fmt(old["median"]), _fmt(new["median"])),
            (f"{pair}: share significant", _fmt(old["share_significant"]), _fmt(new["share_significant"])),
        ]
        if np.isfinite(old["baseline_estimate"]) or np.isfinite(new["baseline_estimate"]):
            rows.append((f"{pair}: baseline estimate (s.e.)",
                         f"{_fmt(old['baseline_estimate'])} ({_fmt(old['baseline_std_error'])})",
                         f"{_fmt(new['baseline_estimate'])} ({_fmt(new['baseline_std_error'])})"))
    body = [f"{latex_escape(a)} & {b} & {d} \\\\" for a, b, d in rows]
    notes = " ".join(latex_escape(n) for n in cmp.notes)
    return "\n".join([r"\begin{tabular}{@{}lrr@{}}", r"\toprule", r" & previous round & this round \\", r"\midrule",
                      *body, r"\bottomrule", r"\end{tabular}", "", (r"\par\footnotesize " + notes) if notes else "",
                      ""])


def archive_round(run_folder: str | Path, *, label: str = "", today: date | None = None) -> Path:
    """Copy a finished run's declared outputs into ``<run>/rounds/<date>[-label]/``, read-only.

    A round holds exactly what the run's ``manifest.json`` lists (every output with its SHA-256),
    plus the manifest and REPLICATION.md: files the grid no longer declares (figures of an outcome
    that left it, say) stay out, and a file that changed since the run was made is refused. A
    ``round.json`` lists every file with its SHA-256. An existing round folder is never touched.
    """
    run = Path(run_folder)
    manifest_path = run / "manifest.json"
    if not manifest_path.is_file():
        raise FegridError(f"There is no finished run in '{run}' (no manifest.json); run it before archiving.")
    manifest = json.loads(manifest_path.read_text())
    declared = {}
    for entry in manifest.get("outputs", {}).values():
        if "file" not in entry:
            raise FegridError(f"The manifest in '{run}' was written by an older fegrid; run the grid again "
                              "before archiving it.")
        declared[entry["file"]] = entry["sha256"]
    for rel, sha in declared.items():
        path = run / rel
        if not path.is_file() or hashlib.sha256(path.read_bytes()).hexdigest() != sha:
            raise FegridError(f"The output '{path}' is missing or changed since the run that wrote manifest.json; "
                              "run the grid again before archiving it.")
    name = (today or date.today()).isoformat() + (f"-{label}" if label else "")
    if any(ch in name for ch in "/\\") or name.startswith("."):
        raise FegridError(f"The round label '{label}' cannot be used in a folder name.")
    target = run / ROUNDS_FOLDER / name
    if target.exists():
        raise FegridError(f"The round '{target}' exists already and is never overwritten; give another --label.")
    tmp = target.with_name(f".{name}.part")
    if tmp.exists():
        shutil.rmtree(tmp)
    provenance = [p.name for p in RunPaths(run.parent, run.name).provenance_files().values()]
    for rel in [*declared, *provenance]:
        if (run / rel).is_file():
            (tmp / rel).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(run / rel, tmp / rel)
    files = {}
    for path in sorted(p for p in tmp.rglob("*") if p.is_file()):
        files[path.relative_to(tmp).as_posix()] = hashlib.sha256(path.read_bytes()).hexdigest()
    write_json(tmp / "round.json", {"round": name, "source": str(run), "files": files})
    write_text(tmp / "README.md", f"# Round {name}\n\nFrozen copy of `{run}` made by `fegrid archive`. Read-only; "
                                  "compare a later run with `fegrid compare " + str(target) + " " + str(run) + "`.\n")
    os.replace(tmp, target)
    for path in sorted(target.rglob("*"), reverse=True):
        path.chmod(stat.S_IRUSR | stat.S_IRGRP | stat.S_IROTH | (
            stat.S_IXUSR | stat.S_IXGRP | stat.S_IXOTH if path.is_dir() else 0))
    target.chmod(stat.S_IRUSR | stat.S_IXUSR | stat.S_IRGRP | stat.S_IXGRP | stat.S_IROTH | stat.S_IXOTH)
    return target
