"""A worker gives its free heap memory back to the system when it goes idle.

A unit's large arrays are memory-mapped and go back to the system when
freed, but glibc's allocator keeps freed smaller blocks (and, once it has
raised its mapping threshold after freeing a large block, arrays of up to
32 MB) in its heap for reuse: after a detect unit of the 4096-column night a
process held ~90 MB more than it used.  That costs nothing while the worker
runs units like it, which reuse the heap, but a worker left idle while the
other runs a night-wide stage (astrometry, the zero point) holds it all
along, and the process tree's peak memory is then reached there.
:func:`release_free_memory` asks glibc to return the heap's free pages
(``malloc_trim(0)``, a few ms); elsewhere (another C library) it does
nothing.

It is asked for once a process has run no unit for :data:`IDLE_SECONDS`
(:func:`release_when_idle`), not after every unit: the next unit, usually
queued already, would fault in again every page given back (the pages of
~90 MB, zeroed by the kernel).  Trimmed after each unit, a run of the 4096 x
16 x 2048 night took 1.2-1.4 million page faults in its process tree and
10-12 s of system time; trimmed once idle, 0.86 million and ~8 s, with the
same peak memory (1.41 GB RSS, 1.21 GB PSS; never trimmed: 1.52-1.55 GB
RSS).
"""

from __future__ import annotations

import ctypes
import functools
import threading
import time

from pipeline.runner import _warm

__all__ = ["IDLE_SECONDS", "release_free_memory", "release_when_idle"]

#: Seconds with no unit running after which a process returns its free heap
#: memory: more than the gap between a worker's consecutive units (a few ms;
#: the next is queued before the last ends), well under a night-wide stage.
IDLE_SECONDS = 0.2

_DUE = threading.Event()  # a unit ended since the last release
_RELEASER: list[threading.Thread] = []
_STARTING = threading.Lock()


@functools.cache
def _malloc_trim():
    """glibc's ``malloc_trim``, or None where the C library has none."""
    try:  # the process's own symbols, the C library's among them
        trim = ctypes.CDLL(None).malloc_trim
    except (OSError, AttributeError):
        return None
    trim.argtypes = [ctypes.c_size_t]
    trim.restype = ctypes.c_int
    return trim


def release_free_memory() -> bool:
    """Return the C heap's free pages to the system; whether the C library could."""
    trim = _malloc_trim()
    if trim is None:
        return False
    trim(0)
    return True


def release_when_idle() -> None:
    """After a unit: return the heap's free pages once this process is idle.

    A daemon thread (started on the first call) waits until no unit has
    run in the process for :data:`IDLE_SECONDS`
    (:func:`pipeline.runner._warm.seconds_idle`), then calls
    :func:`release_free_memory`, once per spell of idleness after a unit.
    """
    _DUE.set()
    with _STARTING:
        if not _RELEASER:
            thread = threading.Thread(target=_release_when_due, name="zdrift-heap", daemon=True)
            thread.start()
            _RELEASER.append(thread)


def _release_when_due() -> None:
    while True:
        _DUE.wait()
        idle = _warm.seconds_idle()
        while idle < IDLE_SECONDS:
            time.sleep(IDLE_SECONDS - idle)
            idle = _warm.seconds_idle()
        _DUE.clear()  # before the release: a unit ending from now on asks again
        release_free_memory()
