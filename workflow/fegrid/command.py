"""The ``fegrid`` command's entry point.

Its process uses one thread in its linear algebra, as every job does (``pipeline.JOB_THREAD_VARIABLES``),
unless the user set the variables: set here, before numpy loads. ``fegrid plan`` times a few fits and
draws in this process to estimate a run's CPU seconds, and a pool of threads spinning beside one busy
thread counted two to three times the CPU time the jobs spend (the estimate of the demo's draws read
2 min 43 s for 79 s).
"""

from __future__ import annotations

import os
import sys
from collections.abc import Sequence

from . import early
from .errors import INTERRUPTED
from .threads import THREAD_VARIABLES


def _runs_snakemake(argv: Sequence[str]) -> bool:
    """Whether the command line asks for a subcommand that runs Snakemake (its first word that is not an
    option; ``--help`` anywhere before ``--`` asks for help instead)."""
    words = list(argv[:argv.index("--")] if "--" in argv else argv)
    if "-h" in words or "--help" in words:
        return False
    first = next((w for w in words if not w.startswith("-")), None)
    return first in early.SNAKEMAKE_COMMANDS


def main() -> int:
    """Run the ``fegrid`` command with one linear-algebra thread (see the module docstring)."""
    for variable in THREAD_VARIABLES:
        os.environ.setdefault(variable, "1")
    if _runs_snakemake(sys.argv[1:]):
        early.begin()  # Snakemake imports itself while fegrid loads and checks the grid (fegrid.early)
    try:
        from .cli import main as run

        code = run()
    except KeyboardInterrupt:  # Ctrl-C while fegrid loads (once loaded, fegrid.cli says so itself)
        early.cancel_pending()
        print(INTERRUPTED, file=sys.stderr)
        code = 130
    early.exit_now(code)  # the run is over: skip the teardown of pandas, numpy and the rest
    return code


if __name__ == "__main__":
    raise SystemExit(main())
