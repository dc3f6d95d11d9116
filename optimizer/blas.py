"""One thread for the linear-algebra libraries, unless the user chose otherwise.

The tool's matrices are small (at most a few hundred rows), and OpenBLAS's idle threads
spin. Measured on the demo search (60 plan and 20 + 20 baseline trials, one worker, 2
cores): 113 s CPU for 69 s wall with OpenBLAS's default threads, 65 s CPU for 73 s wall
with one. With two worker processes the spinning threads took the cores the workers
needed (two workers were no faster than one). Must run before numpy loads its BLAS: the
command line calls it first thing, and a worker pool before it spawns its processes.
"""

from __future__ import annotations

import os

__all__ = [
    "THREAD_VARIABLES",
    "one_thread",
]

#: The variables the BLAS/OpenMP runtimes read at load time.
THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def one_thread() -> None:
    """Set each thread-count variable to 1 where the environment does not set it."""
    for var in THREAD_VARIABLES:
        os.environ.setdefault(var, "1")
