"""The run folder's lock: one fitting process per run folder at a time.

The lock is an advisory lock on ``<run>/.lock`` held through an open file: the operating system
releases it when every process holding that open file has ended, however they end (even killed),
so a lock is never left behind. ``fegrid run`` hands the open file to its Snakemake process, so
the lock stays held while Snakemake and its jobs run, even if ``fegrid run`` itself is killed;
a plain ``snakemake`` run takes the same lock when it starts (``workflow/rules/common.smk``).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import IO

from .errors import FegridError

__all__ = ["RunLock"]


def _try_lock(fh: IO[str]) -> bool:
    """Take an exclusive, non-blocking lock on ``fh``; False when another process holds it."""
    try:
        import fcntl
    except ImportError:  # Windows
        import msvcrt

        try:
            msvcrt.locking(fh.fileno(), msvcrt.LK_NBLCK, 1)
        except OSError:
            return False
        return True
    try:
        fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return False
    return True


class RunLock:
    """An exclusive lock on one run folder (see the module docstring)."""

    #: Set in the environment of the Snakemake process that ``fegrid run`` starts while it holds
    #: the lock on that process's behalf.
    HELD_ENV = "FEGRID_RUN_LOCK_HELD"

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.fh: IO[str] | None = None

    def acquire(self) -> RunLock:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        fh = open(self.path, "a")  # noqa: SIM115 - held for the lock's lifetime
        if not _try_lock(fh):
            fh.close()
            raise FegridError(
                f"Another fegrid or Snakemake run is working on this run folder (it holds the lock {self.path}); "
                "wait for it to finish, or stop it, then run again."
            )
        self.fh = fh
        return self

    def fileno(self) -> int:
        assert self.fh is not None, "the lock is not held"
        return self.fh.fileno()

    def release(self) -> None:
        if self.fh is not None:
            self.fh.close()  # closing the last holder of the open file releases the lock
            self.fh = None

    def __enter__(self) -> RunLock:
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()

    @staticmethod
    def inheritable_env(lock: RunLock) -> dict[str, str]:
        """Environment for a child process that holds ``lock`` through an inherited file."""
        return {**os.environ, RunLock.HELD_ENV: str(lock.path)}
