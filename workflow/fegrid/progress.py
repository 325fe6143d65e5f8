"""What a run is doing, in a few lines: progress of each stage, read from the run folder.

``fegrid run`` starts Snakemake with its per-job log silenced (``--verbose`` keeps it) and watches
the files the plan names instead: fit results, the ledger, summaries, figures, bootstrap draws,
the joint tests, the appendix and the manifest. Each stage gets a line with counts and an estimate
of the time left (from the pace so far); the moment the ledger exists, it says so, because the
draws that follow can take much longer than the fits. On a terminal a stage's line is rewritten
in place; in a log, a new line is written at most every :data:`LOG_EVERY` seconds per stage.

It also estimates a grid's cost before it runs (:func:`estimate_costs`), from one block fitted in
the process: what ``fegrid plan`` prints.
"""

from __future__ import annotations

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
            written = [i for i in stage.todo if self._is_written(stage.files[i])]
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
            # the pace of this stage alone: between its first and its latest file once two exist (the
            # stages before it do not count), from the run's start while only one does
            times = sorted(stage.files[i].stat().st_mtime for i in written)
            if len(times) > 1 and times[-1] > times[0]:
                pace: float | None = (times[-1] - times[0]) / (len(times) - 1)
            else:  # content-named jobs (fits, draws) start with the run; a few report files say nothing
                pace = (now - self.start) / stage.done if stage.fresh_only else None
            left = "" if pace is None else f", about {duration(pace * (len(stage.todo) - stage.done))} left"
            if self.tty or now - stage.last_line >= LOG_EVERY:
                self._print(stage.name, f"{stage.name}: {units_done} of {units_total} {stage.unit}{left}",
                            final=False)
                stage.last_line = now

    def _print(self, name: str, text: str, *, final: bool) -> None:
        if self.tty:
            prefix = "\r\033[K" if self._open == name else ("\n" if self._open else "")
            self.out.write(f"{prefix}fegrid: {text}" + ("\n" if final else ""))
            self._open = "" if final else name
        else:
            self.out.write(f"fegrid: {text}\n")
        self.out.flush()

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
            self.out.write("\n")
            self.out.flush()


@dataclass(frozen=True)
class Costs:
    """A grid's estimated cost from one block fitted in the process."""

    probe_specs: int
    probe_seconds: float
    fit_cpu_seconds: float
    draws_cpu_seconds: float
    cores: int

    def text(self) -> str:
        wall = (self.fit_cpu_seconds + self.draws_cpu_seconds) / max(self.cores, 1)
        return (f"estimated cost: fits ~{duration(self.fit_cpu_seconds)} of CPU, bootstrap draws "
                f"~{duration(self.draws_cpu_seconds)}; about {duration(wall)} on {self.cores} "
                f"core{'s' if self.cores != 1 else ''} (from one block of {self.probe_specs} specifications fitted "
                f"in {self.probe_seconds:.2f} s; start-up and Snakemake's own time not counted)")


def estimate_costs(plan, frame, *, cores: int) -> Costs:
    """Fit the plan's largest block once as the fit jobs do and once as a bootstrap draw does (no
    wild bootstrap), and scale by the grid's specifications and draws."""
    from .estimate import fit_block
    from .joint import without_wild
    from .pipeline import ContentKeys

    by_block: dict[str, list] = {}
    for spec in plan.specs:
        by_block.setdefault(spec.block_key, []).append(spec)
    block = max(by_block.values(), key=len)
    sample = ContentKeys(plan.grid, frame).sample(block[0])
    settings = plan.grid.block_settings(block[0])
    requests = [s.request() for s in block]
    plain = [without_wild(r) for r in requests]
    started = time.perf_counter()
    fit_block(sample, settings, requests)
    fit_seconds = time.perf_counter() - started
    started = time.perf_counter()
    fit_block(sample, settings, plain)
    draw_seconds = time.perf_counter() - started
    n = len(plan.specs)
    return Costs(probe_specs=len(block), probe_seconds=fit_seconds, fit_cpu_seconds=fit_seconds / len(block) * n,
                 draws_cpu_seconds=draw_seconds / len(block) * n * plan.grid.draws, cores=cores)
