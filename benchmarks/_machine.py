"""What every benchmark script shares: thread limits, repeats and the machine's state.

Import this module before numpy: :func:`limit_threads` only takes effect on
BLAS/OpenMP libraries loaded after it.  It imports nothing heavy itself.
"""

from __future__ import annotations

import os
import statistics
import time
from collections.abc import Callable

THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def limit_threads(n_threads: int) -> None:
    """Give BLAS and OpenMP ``n_threads`` threads (before numpy is imported)."""
    for name in THREAD_VARIABLES:
        os.environ[name] = str(n_threads)


def machine_state() -> str:
    """One line: CPUs, load averages and thread limits, to print beside timings.

    A load average near or above the number of CPUs means other processes
    shared the cores, and the timings are upper bounds.
    """
    load = ", ".join(f"{value:.2f}" for value in os.getloadavg())
    threads = os.environ.get("OMP_NUM_THREADS", "unset")
    return f"machine: {os.cpu_count()} CPUs, load average {load} (1/5/15 min), {threads} threads"


def repeat_timing(function: Callable[[], object], repeat: int) -> list[float]:
    """Wall-clock seconds of ``repeat`` calls of ``function``."""
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        function()
        times.append(time.perf_counter() - start)
    return times


def describe(times: list[float]) -> str:
    """``best B s, median M s of N`` for a list of wall times."""
    return f"best {min(times):.3f} s, median {statistics.median(times):.3f} s of {len(times)}"
