"""What a run is doing, in a few lines: progress of each stage, read from the run folder.

``fegrid run`` starts Snakemake with its per-job log silenced (``--verbose`` keeps it) and watches
the files the plan names instead: fit results, the ledger, summaries, figures, bootstrap draws,
the joint tests, the appendix and the manifest. Each stage gets a line with counts and an estimate
of the time left (from the pace so far); the moment the ledger exists, it says so, because the
draws that follow can take much longer than the fits. On a terminal a stage's line is rewritten
in place; in a log, a new line is written at most every :data:`LOG_EVERY` seconds per stage.

It also estimates a grid's cost before it runs (:func:`estimate_costs`), from a few blocks of each
estimation method fitted and drawn in the process: what ``fegrid plan`` prints.
"""

from __future__ import annotations

import os
import sys
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TextIO

__all__ = ["RunMonitor", "Stage", "estimate_costs", "Costs", "duration"]

#: Seconds between two lines of one stage when the output is not a terminal.
LOG_EVERY = 10.0


def duration(seconds: float) -> str:
    """``42 s``, ``3 min 10 s``, ``2 h 05 min``."""
    seconds = max(0.0, float(seconds))
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 3600:
        return f"{int(seconds // 60)} min {int(seconds % 60):02d} s"
    return f"{int(seconds // 3600)} h {int(seconds % 3600 // 60):02d} min"


@dataclass
class Stage:
    """One stage: the files it writes, each worth ``units`` of ``unit`` (one fit file = its
    specifications). Content-named files (``fresh_only``: fits, draws) that exist at the start are
    up to date and not this run's work; files with fixed names count when written during the run."""

    name: str
    files: Sequence[Path]
    unit: str
    units: Sequence[int]
    done_note: str = ""
    fresh_only: bool = False
    logs: Sequence[Path] = ()  # the jobs' logs, which appear when a job starts
    started: float | None = None  # when the monitor first saw one of them
    side_by_side: int = 0  # the most of its jobs seen running at once
    done: int = -1
    last_line: float = 0.0
    finished: bool = False
    todo: list[int] = field(default_factory=list)


class RunMonitor:
    """Poll the run folder while Snakemake works and print each stage's progress."""

    def __init__(self, stages: Sequence[Stage], *, out: TextIO | None = None, poll: float = 1.0,
                 clock: Callable[[], float] = time.time) -> None:
        self.stages = list(stages)
        self.out = out or sys.stdout
        self.poll = poll
        self.clock = clock
        self.tty = bool(getattr(self.out, "isatty", lambda: False)())
        self.start = clock()
        for stage in self.stages:
            stage.todo = [i for i, f in enumerate(stage.files) if not (stage.fresh_only and f.is_file())]
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._open = ""  # the stage whose line a terminal shows unfinished
        self._gone = False  # the reader of the lines went away

    def _is_written(self, path: Path) -> bool:
        try:
            return path.stat().st_mtime >= self.start - 1.0
        except FileNotFoundError:
            return False

    def update(self) -> None:
        """Look at the files once and print what changed."""
        now = self.clock()
        for stage in self.stages:
            if stage.finished or not stage.todo:
                continue
            started = sum(self._is_written(log) for log in stage.logs)
            if stage.started is None and started:
                stage.started = now
            written = [i for i in stage.todo if self._is_written(stage.files[i])]
            # the most jobs seen running side by side (started, no result yet)
            stage.side_by_side = max(stage.side_by_side, started - len(written))
            if len(written) == stage.done or not written:
                continue
            stage.done = len(written)
            units_done = sum(stage.units[i] for i in written)
            units_total = sum(stage.units[i] for i in stage.todo)
            if stage.done >= len(stage.todo):
                stage.finished = True
                note = f"; {stage.done_note}" if stage.done_note else ""
                unit = stage.unit[:-1] if units_total == 1 and stage.unit.endswith("s") else stage.unit
                self._print(stage.name, f"{stage.name}: done ({units_total} {unit}){note}", final=True)
                continue
            # the pace of this stage alone (the stages before it do not count): for jobs with logs to
            # watch, the time since their first job started over the jobs done, or over the jobs seen
            # running side by side while fewer are done; otherwise between the first and the latest
            # file once two exist (jobs that run side by side end close together, so the gap between
            # their files says nothing: two draw jobs ending in the same second once read "0 s left")
            times = sorted(stage.files[i].stat().st_mtime for i in written)
            if stage.fresh_only and stage.started is not None:
                pace: float | None = (now - stage.started) / max(stage.done, stage.side_by_side, 1)
            elif len(times) > 1 and times[-1] > times[0]:
                pace = (times[-1] - times[0]) / (len(times) - 1)
            elif stage.fresh_only:  # content-named jobs without logs to watch: from the run's start
                pace = (now - self.start) / stage.done / max(stage.side_by_side, 1)
            else:  # a few report files say nothing
                pace = None
            left = "" if pace is None else f", about {duration(pace * (len(stage.todo) - stage.done))} left"
            if self.tty or now - stage.last_line >= LOG_EVERY:
                self._print(stage.name, f"{stage.name}: {units_done} of {units_total} {stage.unit}{left}",
                            final=False)
                stage.last_line = now

    def _print(self, name: str, text: str, *, final: bool) -> None:
        if self.tty:
            prefix = "\r\033[K" if self._open == name else ("\n" if self._open else "")
            self._write(f"{prefix}fegrid: {text}" + ("\n" if final else ""))
            self._open = "" if final else name
        else:
            self._write(f"fegrid: {text}\n")

    def _write(self, text: str) -> None:
        """Write and flush; once the reader has gone (a closed pipe), write nothing more: the lines are a
        courtesy, and the run they describe goes on (its outcome is in the run folder and the exit code)."""
        if self._gone:
            return
        try:
            self.out.write(text)
            self.out.flush()
        except BrokenPipeError:
            self._gone = True
            try:  # what the stream still holds, and any later print to it, goes nowhere instead of failing
                devnull = os.open(os.devnull, os.O_WRONLY)
                try:
                    os.dup2(devnull, self.out.fileno())
                finally:
                    os.close(devnull)
            except (AttributeError, OSError, ValueError):
                pass

    def _loop(self) -> None:
        while not self._stop.wait(self.poll):
            self.update()

    def __enter__(self) -> RunMonitor:
        self._thread = threading.Thread(target=self._loop, name="fegrid-progress", daemon=True)
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
        self.update()
        if self.tty and self._open:
            self._write("\n")


@dataclass(frozen=True)
class Costs:
    """A grid's estimated cost from a few blocks fitted, and drawn, in the process."""

    probe_specs: int
    probe_seconds: float
    fit_cpu_seconds: float
    draws_cpu_seconds: float
    cores: int
    refitted_draws: bool = False  # joint_inference.method is refit

    def text(self) -> str:
        wall = (self.fit_cpu_seconds + self.draws_cpu_seconds) / max(self.cores, 1)
        hint = ""
        if self.refitted_draws and self.draws_cpu_seconds > max(DRAWS_HINT_SECONDS, 10 * self.fit_cpu_seconds):
            hint = ("; linearized draws (joint_inference.method: linearized, a first-order approximation, see the "
                    "README) would cost about one fit of the grid")
        return (f"estimated cost: fits ~{duration(self.fit_cpu_seconds)} of CPU, bootstrap draws "
                f"~{duration(self.draws_cpu_seconds)}; about {duration(wall)} on {self.cores} "
                f"core{'s' if self.cores != 1 else ''} (from {self.probe_specs} specifications fitted and drawn "
                f"in {self.probe_seconds:.2f} CPU s; start-up and Snakemake's own time not counted){hint}")


#: Above this many CPU seconds of refitted draws (and ten times the fits'), the estimate says what the
#: linearized draws would cost instead.
DRAWS_HINT_SECONDS = 120.0


#: Blocks of each estimation method that :func:`estimate_costs` fits and draws (the smallest, the
#: median and the largest).
PROBE_BLOCKS = 3

#: Draws that :func:`estimate_costs` adds to one draw to time a draw's own cost (their difference, after an
#: untimed first draw).
PROBE_EXTRA_DRAWS = 12


def estimate_costs(plan, frame, *, cores: int) -> Costs:
    """Fit a few blocks of each estimation method as the fit jobs do, and draw them twice as a chunk of
    bootstrap draws does (:func:`fegrid.joint.draw_curves`, reweighting included), and scale each
    method's time by its number of specifications in the grid."""
    from .estimate import fit_block
    from .joint import LINEARIZED, draw_curves, linearized_draws
    from .lazy import load_all
    from .pipeline import ContentKeys

    load_all()  # SciPy's import is not a fit's or a draw's cost (it would be scaled up with them)
    grid = plan.grid
    by_method: dict[str, dict[str, list]] = {}
    for spec in plan.specs:
        by_method.setdefault(spec.estimator.method, {}).setdefault(spec.block_key, []).append(spec)
    content = ContentKeys(grid, frame)
    fit_cpu = draw_cpu = probe_seconds = 0.0
    probe_specs = 0
    for blocks in by_method.values():
        ordered = sorted(blocks.values(), key=len)
        picks = sorted({round(i * (len(ordered) - 1) / max(PROBE_BLOCKS - 1, 1)) for i in range(PROBE_BLOCKS)})
        chosen = [ordered[i] for i in picks]
        n_chosen = sum(len(b) for b in chosen)
        scale = sum(len(b) for b in ordered) / n_chosen
        started = time.process_time()
        for block in chosen:
            fit_block(content.sample(block[0]), grid.block_settings(block[0]), [s.request() for s in block])
        fit_seconds = time.process_time() - started
        drawn = 0.0
        if grid.draws and grid.joint_method == LINEARIZED:  # one fit of the grid and a matrix product
            started = time.process_time()
            linearized_draws(grid, frame, [s for b in chosen for s in b], range(grid.draws), seed=grid.seed,
                             column=grid.resample)
            drawn = time.process_time() - started
            draw_cpu += drawn * scale
        elif grid.draws:  # one draw, then five: a draw's own cost, and a chunk's set-up (paid once per job)
            specs = [s for b in chosen for s in b]
            # first one untimed draw: what a process pays once (first calls, caches) is neither, and it made
            # the first timed call dearer than the second, which read as no cost per draw
            draw_curves(grid, frame, specs, range(1), seed=grid.seed, column=grid.resample)
            seconds = []
            for n_draws in (1, 1 + PROBE_EXTRA_DRAWS):
                started = time.process_time()
                draw_curves(grid, frame, specs, range(n_draws), seed=grid.seed, column=grid.resample)
                seconds.append(time.process_time() - started)
            per_draw = max(seconds[1] - seconds[0], 0.0) / PROBE_EXTRA_DRAWS
            set_up = max(seconds[0] - per_draw, 0.0)
            chunks = len(grid.draw_chunks())
            draw_cpu += (per_draw * grid.draws + set_up * chunks) * scale
            drawn = sum(seconds)
        fit_cpu += fit_seconds * scale
        probe_seconds += fit_seconds + drawn
        probe_specs += n_chosen
    return Costs(probe_specs=probe_specs, probe_seconds=probe_seconds, fit_cpu_seconds=fit_cpu,
                 draws_cpu_seconds=draw_cpu, cores=cores,
                 refitted_draws=bool(grid.draws) and grid.joint_method != LINEARIZED)
