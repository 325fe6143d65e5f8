"""The ``fegrid`` command's entry point.

Its process uses one thread in its linear algebra, as every job does (``pipeline.JOB_THREAD_VARIABLES``),
unless the user set the variables: set here, before numpy loads. ``fegrid plan`` times a few fits and
draws in this process to estimate a run's CPU seconds, and a pool of threads spinning beside one busy
thread counted two to three times the CPU time the jobs spend (the estimate of the demo's draws read
2 min 43 s for 79 s).
"""

from __future__ import annotations

import os

from .threads import THREAD_VARIABLES


def main() -> int:
    """Run the ``fegrid`` command with one linear-algebra thread (see the module docstring)."""
    for variable in THREAD_VARIABLES:
        os.environ.setdefault(variable, "1")
    from .cli import main as run

    return run()
