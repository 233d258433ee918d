"""Loads the compiled core with a short spin time for the OpenBLAS it links.

OpenBLAS worker threads spin (busy-wait, yielding) for about 2^28 CPU cycles, a tenth of a
second, after every multi-threaded call before they sleep. blocksur does its heavy
passes on its own threads, so a BLAS call at the end of one fit (the Cholesky factor of the
GLS matrix) left the pool spinning through the next fit's data pass, competing with it for
the cores: on two cores a mid-size FGLS fit (50 equations, 5,000 rows) took 1.3-1.5x as long
in a loop (benchmarks/README.md). OpenBLAS reads ``OPENBLAS_THREAD_TIMEOUT`` (log2 of the
cycles to spin, 4-30) once, when the library loads, which happens when the core is imported.
So here, and only when the user has not set it: the variable is set to 16 (about 20 us of
spinning) for that import and removed again, so numpy's and scipy's OpenBLAS copies and
child processes see the environment as it was.
"""

from __future__ import annotations

import importlib
import os

#: log2 of the CPU cycles OpenBLAS's idle worker threads spin before they sleep.
SPIN_LOG2_CYCLES = "16"
_VARIABLE = "OPENBLAS_THREAD_TIMEOUT"


def load_core() -> None:
    """Import ``blocksur._core`` with ``OPENBLAS_THREAD_TIMEOUT`` set unless the user set it."""
    if _VARIABLE in os.environ:
        importlib.import_module("blocksur._core")
        return
    os.environ[_VARIABLE] = SPIN_LOG2_CYCLES
    try:
        importlib.import_module("blocksur._core")
    finally:
        os.environ.pop(_VARIABLE, None)
