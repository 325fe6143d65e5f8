"""The environment variables that size the linear-algebra libraries' thread pools: their one home.

Every job declares one thread and Snakemake runs as many jobs side by side as it has cores, so each job's
pool gets one thread (``rules/common.smk``); the ``fegrid`` command's own process does too
(:mod:`fegrid.command`). A value the user set stays.
"""

from __future__ import annotations

__all__ = ["THREAD_VARIABLES"]

THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")
