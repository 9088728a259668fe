"""Work shared with one more thread, for code that releases the GIL.

A night-wide stage runs on one worker while the pool's other core idles:
numpy's loops, compiled loops and pyarrow's kernels release the GIL, so
half of such work can go to a second thread (:func:`in_two_threads`), or
to a thread kept for the process (:class:`DaemonHelper`).

A per-stretch unit shares its work only while a core is idle
(:func:`spare_cores`): the last units of a flow, with the pool's other
worker waiting for them, and a night of one stretch, whose units run in
the run's own process.  Whoever runs the units says how many cores are
idle (:func:`report_spare_cores`); a stage run by anything else (a script,
a test) is told none.
"""

from __future__ import annotations

import os
import queue
import threading
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor

__all__ = ["DaemonHelper", "in_two_threads", "n_cpus", "report_spare_cores", "spare_cores"]

#: What :func:`spare_cores` asks (see :func:`report_spare_cores`).
_SPARE: list[Callable[[], int]] = [lambda: 0]


def spare_cores() -> int:
    """Cores that no unit of the run computes on right now, besides this thread's.

    0 unless whoever runs the units said otherwise (:func:`report_spare_cores`).
    A unit may then share work that releases the GIL with a thread; its
    results must not depend on it.
    """
    return max(int(_SPARE[0]()), 0)


def report_spare_cores(source: Callable[[], int] | None) -> None:
    """Make :func:`spare_cores` ask ``source()`` (None: report none).

    Called by the runner in the processes it runs units in: a pool worker
    reads what the run publishes as its workers take and finish units, the
    run's own process reports every other core while it computes a unit
    alone.
    """
    _SPARE[0] = source if source is not None else (lambda: 0)


def n_cpus() -> int:
    """CPUs this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on every platform
        return os.cpu_count() or 1


def in_two_threads(work, items: list, name: str) -> list:
    """``[work(item) for item in items]``; on two CPUs the second half in a thread.

    A night-wide stage runs on one worker while the pool's other core idles;
    ``work`` must release the GIL for most of its time (numpy, compiled
    loops) and compute each item the same in any thread.  The results come
    in the items' order; the thread (named ``name``) has ended when the call
    returns or raises.
    """
    half = len(items) // 2
    if half == 0 or n_cpus() < 2:
        return [work(item) for item in items]
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix=name) as pool:
        later = pool.submit(lambda: [work(item) for item in items[half:]])
        return [work(item) for item in items[:half]] + later.result()


class DaemonHelper:
    """A thread that runs the calls submitted to it, in order; results come as futures.

    Unlike a :class:`~concurrent.futures.ThreadPoolExecutor`'s, its thread is a
    daemon: one that lives as long as the process does not keep the process
    from ending at once (``zdrift`` ends with
    :func:`pipeline.cli.exit_now`, which waits for every other thread).
    Whoever submits waits for the result; nothing runs there at the end.
    """

    def __init__(self, name: str):
        self._calls: queue.SimpleQueue = queue.SimpleQueue()
        threading.Thread(target=self._serve, name=name, daemon=True).start()

    def _serve(self) -> None:
        while True:
            future, work, args = self._calls.get()
            if not future.set_running_or_notify_cancel():
                continue
            try:
                future.set_result(work(*args))
            except BaseException as exc:  # handed to whoever waits for the result
                future.set_exception(exc)

    def submit(self, work, *args) -> Future:
        """Run ``work(*args)`` in the thread; its result or exception comes in the future."""
        future: Future = Future()
        self._calls.put((future, work, args))
        return future
