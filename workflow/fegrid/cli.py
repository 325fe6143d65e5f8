"""The ``fegrid`` command line.

Commands: ``init`` (a starter config from a data file), ``check`` (config and data, no fitting),
``plan`` (grid size, jobs, what is fitted), ``run`` (Snakemake, with visible progress), ``summary``
(a finished ledger in the terminal), ``demo`` (the invented demo, end to end), ``compare`` and
``archive`` (referee rounds). A user's mistake prints one paragraph and exits with 2.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import signal
import subprocess
import sys
import time
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path

import pandas as pd
from tabulate import tabulate

from . import __version__, early
from .defaults import DEFAULTS
from .errors import INTERRUPTED, FegridDeprecationWarning, FegridError
from .joint import shared_cluster_caution
from .ledger import read_ledger
from .locations import DEMO_CONFIG, PROFILES, SNAKEFILE, pdflatex
from .lock import RunLock
from .pipeline import describe_sizes, fitted_specs, load_checked, make_plan, plan_status, save_plan, stage
from .progress import Costs, RunMonitor, Stage, estimate_costs
from .store import PublishedOutputs, RunPaths, atomic_write
from .summary import choice_medians, curve_summary

__all__ = ["main", "snakemake_command"]

DEFAULT_CONFIG = "config/config.yaml"


def _note_pdflatex() -> None:
    if pdflatex() is None:
        print("note: pdflatex is not installed: appendix.tex is written, appendix.pdf is not (install a TeX "
              "distribution with booktabs and longtable to get it).")


def _job_counts(plan) -> str:
    """Every kind of job a full run of the plan holds, with its count (bootstrap draws included)."""
    names = plan.job_names(build_pdf=pdflatex() is not None)
    parts = [f"{stage} {len(jobs)}" for stage, jobs in names.items() if jobs]
    return f"jobs of a full run ({sum(len(j) for j in names.values())}): " + ", ".join(parts)


def _plural(n: int, word: str) -> str:
    """``word`` with an s unless ``n`` is one: "1 job", "2 jobs"."""
    return word if n == 1 else word + "s"


def _fmt(x: object, digits: int = 4) -> str:
    if isinstance(x, float) and x != x:  # missing (a curve with no fitted baseline): a blank, never "nan"
        return ""
    if isinstance(x, float):
        return f"{x:.{digits}g}" if abs(x) < 1e-3 or abs(x) >= 1e4 else f"{x:.{digits}f}"
    return str(x)


def _cmd_check(args: argparse.Namespace) -> int:
    plan = make_plan(args.config, prepare=True)
    frame = load_checked(plan.grid)
    print(f"config {args.config}: valid; data {plan.grid.data_path}: {len(frame)} rows, "
          f"{frame[plan.grid.panel.unit].nunique()} units, checks passed.")
    _note_pdflatex()
    print(tabulate(describe_sizes(plan.specs), headers=["dimension", "choices", "names"]))
    print(_job_counts(plan))
    left_out = plan.grid.self_controlled()
    if left_out:
        print(f"left out of the grid ({len(left_out)}): " + "; ".join(left_out))
    print(f"{len(plan.specs)} specifications in {len(plan.jobs)} {_plural(len(plan.jobs), 'job')}.")
    _note_baseline(plan)
    _caution_shared_clusters(plan)
    return 0


def _cmd_plan(args: argparse.Namespace) -> int:
    plan = make_plan(args.config, prepare=True)
    frame = load_checked(plan.grid)
    st = plan_status(plan, frame)
    print(f"run '{st.run_name}': {st.specifications} specifications in {st.jobs} "
          f"{_plural(st.jobs, 'job')} "
          f"(data sha256 {st.data_sha256[:12]}...)")
    print(tabulate(describe_sizes(plan.specs), headers=["dimension", "choices", "names"]))
    print(f"already fitted: {st.specs_fitted} specifications; to fit: {st.specs_to_fit} "
          f"(fit jobs to run: {st.jobs - st.jobs_done} of {st.jobs}).")
    print(_job_counts(plan))
    costs = estimate_costs(plan, frame, cores=os.cpu_count() or 1)
    print(costs.text())
    _warn_size(plan, frame, costs.cores, costs)
    _note_baseline(plan)
    _caution_shared_clusters(plan)
    print("outputs (names for replication.exhibits): " + ", ".join(plan.report_outputs(build_pdf=True)))
    if args.list:
        done = fitted_specs(plan, frame)
        rows = [(s.spec_id, "fitted" if s.spec_id in done else "to fit",
                 *(n for _, n in s.names)) for s in plan.specs]
        print(tabulate(rows, headers=["spec_id", "state", *(d for d, _ in plan.specs[0].names)]))
    return 0


def _note_baseline(plan) -> None:
    """Say which specification stands as the baseline when the config names none (the first by id)."""
    if plan.grid.baseline or len(plan.specs) < 2:
        return
    base = plan.grid.baseline_id(plan.specs)
    first = next(s for s in plan.specs if s.spec_id == base)
    # the dimensions whose choice varies across the grid (each specification's names, in the same order)
    varying = {names[0][0] for names in zip(*(s.names for s in plan.specs), strict=True) if len(set(names)) > 1}
    choices = ", ".join(f"{d} {n}" for d, n in first.names if d in varying)
    print(f"note: the config names no baseline, so the first specification by id ({first.spec_id}: {choices}) "
          "stands as the baseline in the ledger, summary, figures and tables; name your headline specification "
          "under 'baseline' (one choice per dimension).", file=sys.stderr)


def _caution_shared_clusters(plan) -> None:
    """Print :func:`fegrid.joint.shared_cluster_caution` when it applies to the grid."""
    caution = shared_cluster_caution(plan.grid, (s.name("clustering") for s in plan.specs))
    if caution:
        print(f"caution: {caution}", file=sys.stderr)


def _warn_size(plan, frame, cores: int, costs: Costs | None = None) -> None:
    """Warn, with the estimated cost, when the grid is larger than ``jobs.warn_above``."""
    limit = int(plan.grid.raw["jobs"]["warn_above"])
    if len(plan.specs) > limit:
        costs = costs or estimate_costs(plan, frame, cores=cores)
        print(f"warning: {len(plan.specs):,} specifications, more than jobs.warn_above ({limit:,}); "
              f"{costs.text()}. Check that the grid is the one you mean to declare.", file=sys.stderr)


def _stages(plan) -> list[Stage]:
    """What the progress lines of ``fegrid run`` watch, in the order the stages finish."""
    paths = plan.paths
    draws = [len(chunk) for chunk in plan.grid.draw_chunks()]
    figures = plan.figure_paths("pdf") + plan.adoption_figure_paths("pdf")
    tables = [files["md"] for files in plan.table_paths().values()]
    appendix = [paths.file("appendix.tex")] + ([paths.file("appendix.pdf")] if pdflatex() else [])
    return [
        Stage("fits", plan.fit_paths(), "specifications", list(plan.job_sizes.values()), fresh_only=True,
              logs=[paths.log("fit_job", job.key) for job in plan.jobs]),
        Stage("ledger", [paths.ledger_csv], "specifications", [plan.n_specs],
              done_note=f"written: {paths.ledger_csv} (summary and figures next, then the bootstrap draws)"),
        Stage("summary", [paths.file("summary.md")], "files", [1], done_note=f"{paths.file('summary.md')}"),
        Stage("figures", figures, "figures", [1] * len(figures), done_note=f"in {paths.run / 'figures'}"),
        Stage("tables", tables, "tables", [1] * len(tables), done_note=f"in {paths.run / 'tables'}"),
        Stage("bootstrap draws", plan.joint_paths(), "draws", draws, fresh_only=True,
              logs=[paths.log("draw_null_curves", f"{plan.joint_key}-{i:04d}") for i in range(len(draws))]),
        Stage("joint tests", [paths.file("joint_tests.csv")], "files", [1],
              done_note=str(paths.file("joint_tests.md"))),
        Stage("appendix", appendix, "files", [1] * len(appendix), done_note=str(appendix[-1])),
        Stage("provenance", [paths.manifest], "files", [1], done_note=f"{paths.manifest}, {paths.replication}"),
    ]


def snakemake_command(config: str | Path, cores: int, extra: Sequence[str] = (), *, quiet: bool = False) -> list[str]:
    """The Snakemake call behind ``fegrid run``.

    ``--rerun-incomplete`` and ``--nolock`` let a run killed at any point resume with the same
    command: every output is written atomically and named by content, and fegrid's own lock (an
    ``flock`` that dies with its process) keeps two runs of one grid apart.
    """
    return [
        sys.executable, "-m", "snakemake",
        "--snakefile", str(SNAKEFILE),
        "--directory", os.getcwd(),
        "--configfile", str(Path(config).resolve()),
        # fegrid's progress lines replace Snakemake's log of every job; errors and failed logs still show
        *(["--quiet", "all"] if quiet else []),
        "--cores", str(cores),
        "--rerun-incomplete", "--nolock", "--show-failed-logs",
        *extra,
    ]


def _cmd_run(args: argparse.Namespace) -> int:
    extra = list(args.snakemake_args)
    if args.profile:
        extra = ["--workflow-profile", str(_profile(args.profile)), *extra]
    plan = make_plan(args.config, prepare=True)
    frame = load_checked(plan.grid)
    _warn_size(plan, frame, args.cores)
    _note_baseline(plan)
    _caution_shared_clusters(plan)

    def while_snakemake_starts() -> RunMonitor:
        # what is fitted already is counted while Snakemake starts (a second or more before its first job,
        # whose results come later still), then the progress lines follow
        st = plan_status(plan, frame)
        print(f"fegrid: run '{plan.grid.run_name}': {st.specifications} specifications, "
              f"{st.specs_to_fit} to fit; {st.jobs - st.jobs_done} of {st.jobs} fit "
              f"{_plural(st.jobs, 'job')} to run.",
              flush=True)
        _note_pdflatex()
        return RunMonitor(_stages(plan) if not args.verbose else [])

    # Snakemake's own output goes to a file while the terminal shows fegrid's progress lines (unless the user
    # asked for Snakemake's view: --verbose, or Snakemake's own arguments, such as --dry-run)
    captured = plan.paths.snakemake_log if not args.verbose and not args.snakemake_args else None
    with RunLock(plan.paths.lock) as lock:
        save_plan(plan)  # Snakemake's parse reads it back instead of expanding the grid again
        outputs = PublishedOutputs(plan.paths)
        command = snakemake_command(args.config, args.cores, [*_rebuild_reports(plan), *extra],
                                    quiet=not args.verbose and captured is None)
        outputs.keep_previous()
        started = time.time()
        try:
            code = _run_snakemake(command, lock, while_snakemake_starts, log=captured)
        except BaseException:  # fegrid's side failed (Snakemake was stopped): the earlier results stay whole
            _put_back(outputs, plan.paths)
            raise
        if code != 0 and not args.verbose:
            _explain_failure(plan.paths, started, captured)
        if code != 0:
            restored = _put_back(outputs, plan.paths)
            what = (f"the previous run's {restored} output files were put back, so the run folder holds "
                    "one consistent set" if restored else
                    "there were no earlier results; what this run wrote before failing is kept")
            reason = ("interrupted" if code in (-signal.SIGINT, -signal.SIGTERM, 130, 143)
                      else f"the Snakemake run failed (exit code {code}); see the log above (--verbose shows "
                           "Snakemake's log of every job)")
            print(f"fegrid: {reason}. {what.capitalize()}. Run the same command again to resume.", file=sys.stderr)
            return code if code > 0 else 128 - code
        outputs.drop_previous()
        if _written_since(plan.paths.ledger_parquet, started):  # the reports were rebuilt (not a dry run)
            plan.paths.put_back.unlink(missing_ok=True)
        stale = outputs.prune_undeclared(plan.declared_outputs(build_pdf=pdflatex() is not None))
        if stale:
            print(f"fegrid: removed {len(stale)} output(s) the grid no longer declares: {', '.join(stale)}")
    if not args.quiet:
        _print_summary(plan.paths.ledger_csv, plan.grid.level)
    return 0


def _explain_failure(paths: RunPaths, started: float, captured: Path | None = None) -> None:
    """With Snakemake's log off the terminal, show why the run failed: the end of every job log written
    during the run that reports an error; else what Snakemake printed (``captured``) from its first error on
    (a job it could not start, such as a cluster's refusal to queue it, leaves no job log); else the end of
    Snakemake's own log."""
    shown = 0
    logs = sorted((p for p in paths.run.joinpath("logs").rglob("*.log")
                   if p != paths.snakemake_log and _written_since(p, started)),
                  key=lambda p: p.stat().st_mtime) if paths.run.joinpath("logs").is_dir() else []
    for log in logs:
        text = log.read_text(errors="replace")
        if any(mark in text for mark in ("fegrid: ", "Traceback", "Error", "error:")):
            tail = "\n".join(text.rstrip().splitlines()[-20:])
            print(f"fegrid: the job logged in {log} failed:\n{tail}", file=sys.stderr)
            shown += 1
    if shown:
        return
    if captured is not None and captured.is_file():
        lines = captured.read_text(errors="replace").rstrip().splitlines()
        # the last failed job's report (a job retried reports once per attempt), else the first error
        jobs = [i for i, line in enumerate(lines) if line.startswith("Error in rule")]
        first = jobs[-1] if jobs else next((i for i, line in enumerate(lines) if "Error" in line or "error:" in line),
                                           max(len(lines) - 25, 0))
        print(f"fegrid: Snakemake reported (all of it in {captured}):\n" + "\n".join(lines[first:][:25]),
              file=sys.stderr)
        return
    own = sorted(Path(".snakemake", "log").glob("*.snakemake.log"), key=lambda p: p.stat().st_mtime)
    if own and _written_since(own[-1], started):
        tail = "\n".join(own[-1].read_text(errors="replace").rstrip().splitlines()[-25:])
        print(f"fegrid: Snakemake's log ({own[-1]}) ends with:\n{tail}", file=sys.stderr)


def _profile(name: str) -> Path:
    """A Snakemake profile shipped with fegrid (by name), or a profile folder of the user's."""
    shipped = PROFILES / name
    if shipped.is_dir():
        return shipped
    if Path(name).is_dir():
        return Path(name).resolve()
    known = sorted(p.name for p in PROFILES.iterdir() if p.is_dir())
    raise FegridError(f"--profile '{name}' is neither a profile shipped with fegrid ({', '.join(known)}) nor a "
                      "folder holding a Snakemake profile's config.yaml.")


def _put_back(outputs: PublishedOutputs, paths: RunPaths) -> int:
    """Put the previous run's published files back after a failed run, and mark the folder (``paths.put_back``)
    when there were any: Snakemake's records (each output's inputs and their checksums) may now describe
    the failed run's files, so they cannot say whether the put-back ones are up to date."""
    restored = outputs.restore_previous()
    if restored:
        paths.put_back.parent.mkdir(parents=True, exist_ok=True)
        atomic_write(paths.put_back, lambda fh: fh.write(b"the published files were put back after a failed run\n"),
                     durable=False)
    return restored


def _written_since(path: Path, started: float) -> bool:
    """Whether ``path`` was written during the run that started at ``started`` (a second's slack)."""
    try:
        return path.stat().st_mtime >= started - 1.0
    except FileNotFoundError:
        return False


def _rebuild_reports(plan) -> list[str]:
    """Snakemake's arguments that rebuild the ledger, and with it every published file (all follow from it),
    when Snakemake's records cannot be trusted to: after files were put back (the mark of :func:`_put_back`;
    fegrid 0.6.8 and older left no mark), or whenever the ledger is not the config's grid. Records that
    describe other files (checksums of the inputs of a ledger that was replaced) call it up to date; and
    without records, a fit job whose result is missing is not rerun for a ledger that exists."""
    paths = plan.paths
    if paths.put_back.is_file() or (paths.ledger_parquet.is_file()
                                    and _held_spec_ids(paths) != {s.spec_id for s in plan.specs}):
        return ["--forcerun", stage("gather_ledger")]
    return []


def _held_spec_ids(paths: RunPaths) -> set[str] | None:
    """The ids of the specifications the run folder's ledger holds (``None``: no ledger, or unreadable)."""
    try:
        return set(pd.read_parquet(paths.ledger_parquet, columns=["spec_id"])["spec_id"])
    except (OSError, ValueError, KeyError):
        return None


def _run_snakemake(command: list[str], lock: RunLock,
                   meanwhile: Callable[[], contextlib.AbstractContextManager[object]] | None = None, *,
                   log: Path | None = None) -> int:
    """Run Snakemake holding ``lock`` for it; forward SIGINT, SIGTERM and SIGHUP and wait for it. With
    ``log``, what Snakemake prints goes to that file instead of the terminal.

    Snakemake inherits the open lock file, so the lock is held until Snakemake is gone, even when
    this process alone is killed outright; a signal to the whole process group (Ctrl-C in a
    terminal, a scheduler's kill) reaches Snakemake directly. ``meanwhile`` runs once Snakemake has
    started, and the context it returns (the progress lines) stays open while Snakemake works.
    """
    forwarded = [signal.SIGINT, signal.SIGTERM] + ([signal.SIGHUP] if hasattr(signal, "SIGHUP") else [])
    received: list[int] = []
    proc: subprocess.Popen[bytes] | None = None

    def forward(signum: int, frame: object) -> None:
        # Snakemake cancels cleanly on SIGINT (stops its jobs, marks their outputs incomplete),
        # whatever signal asked us to stop; asked twice, it is ended at once
        received.append(signum)
        if proc is not None:
            with contextlib.suppress(ProcessLookupError):
                proc.send_signal(signal.SIGINT if len(received) < 2 else signal.SIGKILL)

    previous = {s: signal.signal(s, forward) for s in forwarded}
    try:
        if received:  # asked to stop before Snakemake started
            return -received[0]
        sink = None
        if log is not None:
            log.parent.mkdir(parents=True, exist_ok=True)
            sink = open(log, "wb")  # noqa: SIM115 - closed once Snakemake has ended

        def start() -> subprocess.Popen[bytes]:
            return subprocess.Popen(command, pass_fds=(lock.fileno(),), env=RunLock.inheritable_env(lock),
                                    stdout=sink, stderr=subprocess.STDOUT if sink is not None else None)

        try:
            waiting = early.take()  # the Snakemake process started with the command, if any (fegrid.early)
            proc = waiting.launch(command, env=RunLock.inheritable_env(lock), pass_fds=(lock.fileno(),),
                                  stdout=None if sink is None else sink.fileno()) if waiting is not None else None
            handed = proc is not None
            if proc is None:
                proc = start()
            with meanwhile() if meanwhile is not None else contextlib.nullcontext():
                code = proc.wait()
                if handed and code == early.NOT_STARTED and not received:  # it could not run Snakemake
                    proc = start()
                    code = proc.wait()
        except BaseException:  # this side failed while Snakemake works: stop it before the error shows
            if proc is not None:
                _stop(proc)
            raise
        finally:
            if sink is not None:
                sink.close()
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)
    return -received[0] if received else code


#: seconds Snakemake gets to stop after SIGINT before it is ended (SIGKILL)
STOP_SECONDS = 60


def _stop(proc: subprocess.Popen[bytes]) -> None:
    """Stop Snakemake: SIGINT (it cancels its jobs and marks their outputs incomplete), then SIGKILL should it
    still run after :data:`STOP_SECONDS` (a Python process interrupted in the middle of an import can hang)."""
    with contextlib.suppress(ProcessLookupError):
        proc.send_signal(signal.SIGINT)
    try:
        proc.wait(timeout=STOP_SECONDS)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()


def _print_summary(ledger_path: Path, level: float) -> None:
    ledger = read_ledger(ledger_path)
    summ = curve_summary(ledger, level)
    print(f"\nledger: {ledger_path} ({len(ledger)} specifications)")
    cols = ["outcome", "focal", "curve", "specs", "fitted", "not_identified", "failed", "baseline_estimate",
            "baseline_percentile", "median", "q25", "q75", "share_baseline_sign",
            "share_significant_dominant"]
    print(tabulate([[_fmt(v) for v in row] for row in summ[cols].itertuples(index=False)],
                   headers=["outcome", "focal", "curve", "specs", "fitted", "not id.", "failed", "baseline",
                            "base pct", "median", "q25", "q75", "same sign", f"signif. ({1 - level:.2g})"]))
    moves = choice_medians(ledger)
    moves = moves[moves["dimension_effect"] > 0]
    if len(moves):
        keys = ["outcome", "focal", "curve", "dimension"]
        top = moves.sort_values("dimension_effect", ascending=False).drop_duplicates(keys).head(6)
        print("\ndimensions that move the estimate most (median change over specifications that differ only "
              "in that dimension):")
        print(tabulate([[r.outcome, r.focal, r.curve, r.dimension, _fmt(r.dimension_effect)] for r in top.itertuples()],
                       headers=[*keys, "largest matched shift"]))


def _cmd_summary(args: argparse.Namespace) -> int:
    if args.ledger:
        path, level = Path(args.ledger), args.level
    else:
        plan = make_plan(args.config)
        path, level = plan.paths.ledger_csv, plan.grid.level
    if not path.is_file():
        raise FegridError(f"There is no ledger at {path}; run 'fegrid run' first.")
    _print_summary(path, level)
    if not args.ledger:
        _note_ledger_behind(plan, args.config)
    return 0


def _note_ledger_behind(plan, config: str) -> None:
    """Say when the ledger is not the config's grid (the config changed since the run, or the run stopped)."""
    held = _held_spec_ids(plan.paths)
    declared = {s.spec_id for s in plan.specs}
    if held is None or held == declared:
        return
    parts = [f"lacks {len(declared - held)} specification(s) the config declares"] if declared - held else []
    parts += [f"holds {len(held - declared)} the config no longer declares"] if held - declared else []
    print(f"note: this ledger {' and '.join(parts)}: it is an earlier run's; 'fegrid run --config {config}' "
          "brings it up to date.", file=sys.stderr)


def _cmd_demo(args: argparse.Namespace) -> int:
    if args.config is not None:
        raise FegridError(
            f"'fegrid demo' always runs the invented demo grid and takes no --config (got '{args.config}'); "
            f"to run your own grid, use 'fegrid run --config {args.config}'."
        )
    args.config = str(DEMO_CONFIG)
    cfg = make_plan(args.config, prepare=True).grid
    print(f"fegrid demo: INVENTED orchard data at {cfg.data_path}; outputs in reports/{cfg.run_name}/")
    return _cmd_run(args)


def _cmd_init(args: argparse.Namespace) -> int:
    from .starter import write_starter

    guess = write_starter(args.data_file, args.out, run_name=args.run_name)
    when = f"time '{guess.time}'" + (f" ({guess.time_frequency})" if guess.time_frequency else "") if guess.time \
        else "no time column"
    print(f"written {args.out}: unit '{guess.unit}', {when} (guessed: lines marked REVIEW); outcome and focal "
          f"regressor are placeholders. Edit them, then: fegrid check --config {args.out}")
    return 0


def _cmd_compare(args: argparse.Namespace) -> int:
    from .rounds import compare_ledgers, comparison_latex, comparison_text, load_ledger
    from .store import write_text

    old, old_manifest, old_path = load_ledger(args.old)
    new, new_manifest, new_path = load_ledger(args.new)
    cmp = compare_ledgers(old, new, tolerance=args.tolerance, level=args.level, old_manifest=old_manifest,
                          new_manifest=new_manifest)
    print(f"comparing {old_path} (old) with {new_path} (new), tolerance {args.tolerance:g}\n")
    print(comparison_text(cmp))
    if args.out:
        out = Path(args.out)
        write_text(out / "comparison.md", "# Ledger comparison\n\n" + comparison_text(cmp, fmt="github"))
        write_text(out / "comparison.tex", comparison_latex(cmp))
        cmp.changed.to_csv(out / "changed.csv", index=False)
        from .figures import draw_comparison, save_curve

        save_curve(draw_comparison(old, new, level=args.level, tolerance=args.tolerance),
                   out / "comparison.png", out / "comparison.pdf")
        print(f"written: {out / 'comparison.md'}, {out / 'comparison.tex'}, {out / 'changed.csv'}, "
              f"{out / 'comparison.png'} and .pdf (how each specification moved)")
    return 0


def _cmd_archive(args: argparse.Namespace) -> int:
    from .rounds import archive_round

    plan = make_plan(args.config)
    target = archive_round(plan.paths.run, label=args.label)
    print(f"archived {plan.paths.run} into {target} (read-only)")
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="fegrid",
        description="Declare a grid of fixed-effects panel regressions in YAML; fit, cache and report it.",
    )
    parser.add_argument("--version", action="version", version=f"fegrid {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    def with_config(p: argparse.ArgumentParser) -> argparse.ArgumentParser:
        p.add_argument("--config", default=DEFAULT_CONFIG, help="the grid's YAML file (default: %(default)s)")
        return p

    p = sub.add_parser("init", help="write a commented starter config from a data file's columns")
    p.add_argument("data_file", help="the panel: CSV (.csv, .csv.gz), Parquet, Feather or .dta")
    p.add_argument("--out", default=DEFAULT_CONFIG, help="the config to write (default: %(default)s)")
    p.add_argument("--run-name", default=None, help="the run's name (default: from the data file's name)")
    with_config(sub.add_parser("check", help="check the config and the data without fitting"))
    p = with_config(sub.add_parser("plan", help="grid size per dimension; what is fitted and what is left"))
    p.add_argument("--list", action="store_true", help="list every specification with its state")
    for name, text in (("run", "fit the grid through Snakemake and gather the ledger"),
                       ("demo", "run the invented demo grid end to end")):
        p = sub.add_parser(name, help=text)
        if name == "run":
            with_config(p)
        else:  # a --config given to demo is refused with a message rather than ignored
            p.add_argument("--config", default=None, help=argparse.SUPPRESS)
        p.add_argument("-c", "--cores", type=int, default=max(1, (os.cpu_count() or 1)),
                       help="jobs run in parallel (default: all cores)")
        p.add_argument("--quiet", action="store_true", help="no summary at the end")
        p.add_argument("--verbose", action="store_true",
                       help="Snakemake's own log of every job instead of fegrid's progress lines")
        p.add_argument("--profile", default=None,
                       help="a Snakemake profile: 'slurm' (shipped with fegrid) or a folder of your own")
        p.add_argument("snakemake_args", nargs=argparse.REMAINDER,
                       help="after '--': extra arguments passed to Snakemake")
    p = with_config(sub.add_parser("summary", help="summarise a finished ledger in the terminal"))
    p.add_argument("--ledger", help="a ledger.csv to summarise instead of the config's")
    p.add_argument("--level", type=float, default=DEFAULTS["confidence_level"], help="confidence level with --ledger")
    p = sub.add_parser("compare", help="what moved between two ledgers (runs, rounds or files), by spec id")
    p.add_argument("old", help="the earlier ledger: a ledger.csv/.parquet, or a run or round folder")
    p.add_argument("new", help="the later ledger, likewise")
    p.add_argument("--tolerance", type=float, default=1e-8,
                   help="relative change of an estimate or SE that counts as changed (default: %(default)s)")
    p.add_argument("--level", type=float, default=DEFAULTS["confidence_level"],
                   help="confidence level for significance flips")
    p.add_argument("--out", help="folder for comparison.md, comparison.tex (response letter) and changed.csv")
    p = with_config(sub.add_parser("archive", help="freeze reports/<run>/ into a dated, read-only round folder"))
    p.add_argument("--label", default="", help="added to the date in the round's folder name")
    return parser


COMMANDS = {"init": _cmd_init, "check": _cmd_check, "plan": _cmd_plan, "run": _cmd_run, "summary": _cmd_summary,
            "demo": _cmd_demo, "compare": _cmd_compare, "archive": _cmd_archive}


def _show_deprecations() -> None:
    """A renamed config spelling is one line on stderr (once), not a Python warning with its source line."""
    shown: set[str] = set()
    original = warnings.showwarning

    def show(message, category, filename, lineno, file=None, line=None):  # noqa: ANN001 - warnings' hook
        if issubclass(category, FegridDeprecationWarning):
            if str(message) not in shown:
                shown.add(str(message))
                print(f"fegrid: deprecated: {message}", file=sys.stderr)
            return
        original(message, category, filename, lineno, file, line)

    warnings.showwarning = show
    warnings.simplefilter("always", FegridDeprecationWarning)


def main(argv: Sequence[str] | None = None) -> int:
    try:
        return _main(argv)
    finally:
        early.cancel_pending()  # a Snakemake started ahead for a run that stopped before handing it its command


def _main(argv: Sequence[str] | None) -> int:
    args = build_parser().parse_args(argv)
    if args.command in early.SNAKEMAKE_COMMANDS:
        early.begin()  # Snakemake starts while fegrid checks the grid (once: `fegrid` may have started it already)
    _show_deprecations()
    extra = getattr(args, "snakemake_args", None)
    if extra and extra[0] != "--":  # (a config file named without --config would go to Snakemake, with what follows)
        hint = f" The grid's YAML file goes after --config (fegrid run --config {extra[0]})." if (
            args.command == "run" and extra[0].endswith((".yaml", ".yml"))) else ""
        print(f"fegrid: error: '{extra[0]}' is not an argument of 'fegrid {args.command}'.{hint} Options of fegrid "
              f"come first, and arguments meant for Snakemake after '--' (fegrid {args.command} -c 2 -- --dry-run). "
              "Nothing was run.", file=sys.stderr)
        return 2
    if extra:
        args.snakemake_args = extra[1:]
    try:
        return COMMANDS[args.command](args)
    except BrokenPipeError:
        # the reader of our output went away (`fegrid check | head`): not an error of the user's
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    except FegridError as exc:
        print(f"fegrid: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(INTERRUPTED, file=sys.stderr)
        return 130


if __name__ == "__main__":
    raise SystemExit(main())
