"""Snakemake started while ``fegrid run`` checks the grid: its start-up overlaps fegrid's own.

``fegrid run`` checks the config and the data, plans the grid and takes the run folder's lock before
Snakemake may start, and Snakemake then spends most of a second importing itself and the modules its
workflow reads before its first job. On a machine with two cores or more the two can overlap: the
command starts a waiting Snakemake process first (:meth:`EarlyStart.begin`), which imports all that and
then waits on a socket. Once the checks pass, :meth:`EarlyStart.launch` hands it Snakemake's arguments,
the environment, the working folder, the open lock file (passed as a file descriptor, so that the lock
is held while Snakemake lives, as when it is started afterwards) and the file for its output; the
process then runs Snakemake exactly as ``python -m snakemake`` with those arguments would.

When the checks fail, or the command stops, the waiting process is killed (:meth:`EarlyStart.cancel`):
it has imported modules and touched nothing. It also ends by itself, silently, when the socket closes
without a command (``fegrid run`` was killed). Where any of this is unavailable (no descriptor passing
on the platform, the process failed to start or to import Snakemake), ``fegrid run`` starts Snakemake
afterwards as before: :meth:`launch` returns ``None``, or the process ends with :data:`NOT_STARTED`.

This module imports only the standard library: the command loads it before anything else.
"""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
from collections.abc import Mapping, Sequence

__all__ = ["NOT_STARTED", "SNAKEMAKE_COMMANDS", "EarlyStart", "begin", "take", "cancel_pending", "exit_now"]

#: the ``fegrid`` subcommands that run Snakemake, and so start it ahead
SNAKEMAKE_COMMANDS = ("run", "demo")
#: exit code of a waiting process that never started Snakemake (no command came, or it could not)
NOT_STARTED = 87
#: the modules Snakemake and fegrid's workflow import at parse time, imported while fegrid checks the grid
WARM_MODULES = ("snakemake.cli", "snakemake.utils", "fegrid.pipeline", "fegrid.keys", "fegrid.renames",
                "fegrid.store", "fegrid.locations", "fegrid.lock")
#: modules Snakemake imports once it runs (its benchmarks, storage, the notebook support of `script:` rules),
#: imported ahead when installed: also so that no job thread imports while a signal may interrupt the main
#: thread's import (an interrupted import can leave Python's import lock held, and the run hung)
LATER_MODULES = ("snakemake.benchmark", "snakemake.storage", "nbformat", "graphlib", "packaging.version")
#: set (to anything) to start Snakemake only after the checks, as fegrid 0.6.10 and older did
OFF_ENV = "FEGRID_NO_EARLY_SNAKEMAKE"


class EarlyStart:
    """A Snakemake process started ahead of its command (see the module docstring)."""

    def __init__(self, proc: subprocess.Popen[bytes], sock: socket.socket) -> None:
        self.proc = proc
        self._sock: socket.socket | None = sock

    @classmethod
    def begin(cls) -> EarlyStart | None:
        """Start the waiting process; ``None`` where descriptors cannot be passed or it is switched off."""
        if os.name != "posix" or not hasattr(socket, "send_fds") or os.environ.get(OFF_ENV):
            return None
        ours, theirs = socket.socketpair()
        try:
            proc = subprocess.Popen([sys.executable, "-m", __name__, str(theirs.fileno())],
                                    pass_fds=(theirs.fileno(),), stdin=subprocess.DEVNULL)
        except OSError:
            ours.close()
            return None
        finally:
            theirs.close()
        return cls(proc, ours)

    def launch(self, command: Sequence[str], *, env: Mapping[str, str], pass_fds: Sequence[int] = (),
               stdout: int | None = None) -> subprocess.Popen[bytes] | None:
        """Hand the waiting process Snakemake's ``command`` (``python -m snakemake ...``, as for
        :class:`subprocess.Popen`), run in the current folder with ``env``, the descriptors ``pass_fds``
        kept open and output to ``stdout`` (with errors; ``None``: where this process writes). Returns the
        process, or ``None`` when it is gone or cannot be reached (then start Snakemake as usual)."""
        sock, self._sock = self._sock, None
        if sock is None:
            return None
        if list(command[:3]) != [sys.executable, "-m", "snakemake"] or self.proc.poll() is not None:
            sock.close()
            self._end()
            return None
        fds = [*pass_fds, *([stdout] if stdout is not None else [])]
        message = {"argv": list(command[3:]), "env": dict(env), "cwd": os.getcwd(), "stdout": stdout is not None}
        try:
            socket.send_fds(sock, [b"F"], fds)
            sock.sendall(json.dumps(message).encode())
        except OSError:
            self._end()
            return None
        finally:
            sock.close()
        return self.proc

    def cancel(self) -> None:
        """Stop the process if it has not been handed a command (it has imported modules, nothing more)."""
        if self._sock is not None:
            self._sock.close()
            self._sock = None
            self._end()

    def _end(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait()


_PENDING: list[EarlyStart] = []


def begin() -> None:
    """Start a waiting Snakemake for this command (once; see :meth:`EarlyStart.begin`)."""
    if not _PENDING:
        early = EarlyStart.begin()
        if early is not None:
            _PENDING.append(early)


def take() -> EarlyStart | None:
    """The waiting Snakemake started for this command, if any; the caller launches or cancels it."""
    return _PENDING.pop() if _PENDING else None


def cancel_pending() -> None:
    """Stop a waiting Snakemake nobody took (the command ended before starting Snakemake)."""
    while _PENDING:
        _PENDING.pop().cancel()


def _receive(fd: int) -> tuple[dict, list[int]] | None:
    """The command and descriptors sent on socket ``fd``; ``None`` when it closed without one."""
    with socket.socket(fileno=fd) as sock:
        head, fds, _, _ = socket.recv_fds(sock, 1, 8)
        if head != b"F":
            return None
        chunks = []
        while chunk := sock.recv(1 << 16):
            chunks.append(chunk)
    try:
        return json.loads(b"".join(chunks)), fds
    except ValueError:  # the sender died mid-message
        return None


def _warm() -> None:
    """Do ahead what every Snakemake start does first: collect its plugins (building its argument parser)
    and import what it opens the workflow's files with. Anything that fails here is done again later."""
    import importlib

    for name in ("smart_open", *LATER_MODULES):  # smart_open: Snakemake's source cache opens the Snakefiles
        try:
            importlib.import_module(name)
        except Exception:  # noqa: BLE001, S112 - only a head start
            continue
    try:
        from snakemake.cli import get_argument_parser

        get_argument_parser()
    except Exception:  # noqa: BLE001, S110 - only a head start
        pass


def exit_now(code: object) -> None:
    """End the process without the interpreter's teardown of every module (0.2 s of a run's wall time
    after its last job with Snakemake's modules loaded; 0.05 s for the ``fegrid`` command's): the exit
    handlers run and the output is flushed first, as at a normal exit. Left to the normal exit
    (``SystemExit``) where another thread still runs or the exit handlers cannot be called."""
    import atexit
    import logging
    import threading

    run_handlers = getattr(atexit, "_run_exitfuncs", None)
    if threading.active_count() > 1 or run_handlers is None:
        raise SystemExit(code)
    if code is None:
        status = 0
    elif isinstance(code, int):
        status = code
    else:
        print(code, file=sys.stderr)
        status = 1
    run_handlers()
    logging.shutdown()
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(status)


def _serve(fd: int) -> int:
    """The waiting process: import Snakemake and the workflow's modules, wait for the command, run it."""
    try:
        import importlib

        for name in WARM_MODULES:
            importlib.import_module(name)
        _warm()
        received = _receive(fd)
    except BaseException:  # noqa: BLE001 - anything at all: fegrid starts Snakemake itself instead
        return NOT_STARTED
    if received is None:
        return NOT_STARTED
    message, fds = received
    if message["stdout"]:
        sink = fds.pop()
        os.dup2(sink, 1)
        os.dup2(sink, 2)
        os.close(sink)
    del fds  # the lock file stays open (so held) while this process lives, as Snakemake's inherited copy would
    os.environ.clear()
    os.environ.update(message["env"])
    os.chdir(message["cwd"])
    import importlib.util

    from snakemake.cli import main

    # what sys.argv holds under `python -m snakemake` (importing snakemake.__main__ would run it)
    spec = importlib.util.find_spec("snakemake.__main__")
    sys.argv = [spec.origin if spec and spec.origin else "snakemake", *message["argv"]]
    try:
        main(message["argv"])
    except SystemExit as done:
        exit_now(done.code)
    return 0


if __name__ == "__main__":
    sys.exit(_serve(int(sys.argv[1])))
