"""A worker's C heap: large blocks kept for the next unit, free memory given back when idle.

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
RSS).  Before and after a night-wide unit it is asked for at once (see
:func:`release_before` and :func:`release_after`): the tree's peak was
reached there.

A worker of the local pool also keeps its large blocks in the heap
(:func:`keep_large_blocks`): by default glibc maps each array of more than
its mapping threshold (at most 32 MB: a float64 plane of a 4096 x 1035
stretch is 36 MB) afresh and unmaps it when freed, and the kernel zeroes
every page of it again at first touch.
"""

from __future__ import annotations

import ctypes
import functools
import threading
import time

from pipeline.runner import _warm

__all__ = [
    "IDLE_SECONDS",
    "LARGE_BLOCKS",
    "keep_large_blocks",
    "release_after",
    "release_before",
    "release_free_memory",
    "release_when_idle",
]

#: Seconds with no unit running after which a process returns its free heap
#: memory: more than the gap between a worker's consecutive units (a few ms;
#: the next is queued before the last ends), well under a night-wide stage.
IDLE_SECONDS = 0.2

#: Blocks up to this size [bytes] come from a worker's heap, and freed ones
#: stay there for reuse, with :func:`keep_large_blocks`: above every array
#: a unit of the 4096-column camera makes (its largest, a float64 plane of
#: a stretch of the default size, is ~36 MB).
LARGE_BLOCKS = 256 * 2**20
#: ``mallopt`` parameters (glibc's malloc.h).
_M_TRIM_THRESHOLD = -1
_M_MMAP_THRESHOLD = -3
#: The highest mapping threshold glibc's dynamic threshold reaches on a
#: 64-bit system (``DEFAULT_MMAP_THRESHOLD_MAX``; the trimming threshold
#: follows at twice it), from memory of glibc's malloc.c.
_DYNAMIC_CEILING = 32 * 2**20
#: Whether this process keeps large blocks (:func:`keep_large_blocks`).
_HEAP = {"keep": False}

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


@functools.cache
def _mallopt():
    """glibc's ``mallopt``, or None where the C library has none."""
    try:
        setting = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):
        return None
    setting.argtypes = [ctypes.c_int, ctypes.c_int]
    setting.restype = ctypes.c_int
    return setting


def keep_large_blocks() -> bool:
    """Make this process keep its per-stretch units' large blocks in its heap, for reuse.

    glibc maps a block above its mapping threshold on its own and unmaps it
    when it is freed; the threshold rises to the largest block freed, but
    no higher than 32 MB.  A per-stretch unit's planes are larger (a float64
    plane of a 4096 x 1035 stretch is 36 MB): each was mapped afresh, and
    the kernel zeroed its pages again as they were first touched.  From
    now on, while a per-stretch unit runs, blocks of up to
    :data:`LARGE_BLOCKS` come from the heap and freed ones stay there for
    the next allocation (mapping and trimming thresholds at
    :data:`LARGE_BLOCKS`); a night-wide unit runs with glibc's highest
    dynamic thresholds instead, and the heap's free pages go back to the
    system before and after it and once the worker idles (see
    :func:`release_before`).  On the 4096 x 16 x 2048 benchmark night this
    took the process tree from ~0.8 to ~0.3 million page faults and its
    system time from ~5.5 to ~3.5 s (CHANGELOG.md).  Returns whether the C
    library took the settings (one without ``mallopt``, not glibc, is left
    as it is).
    """
    _HEAP["keep"] = _thresholds(LARGE_BLOCKS, LARGE_BLOCKS)
    return _HEAP["keep"]


def _thresholds(mapping: int, trimming: int) -> bool:
    """Set glibc's mapping and trimming thresholds [bytes]; whether it took both."""
    setting = _mallopt()
    if setting is None:
        return False
    return bool(setting(_M_MMAP_THRESHOLD, mapping)) & bool(setting(_M_TRIM_THRESHOLD, trimming))


def release_before(scope: str) -> None:
    """Before a unit of ``scope`` (``"night"`` or ``"stretch"``): ready the heap for it.

    A night-wide unit starts from a heap given back to the system: what
    per-stretch units left there is of little use to a night-wide stage's
    many smaller blocks, and the worker running astrometry held it while the
    other worker held its own.  Where large blocks are kept
    (:func:`keep_large_blocks`), it runs with glibc's highest dynamic
    thresholds (a block of more than 32 MB mapped on its own, free memory
    of more than 64 MB at the heap's top given back): with the large ones,
    the astrometry worker of the benchmark night peaked at 0.82-0.87 GB RSS
    instead of 0.76 GB, and the process tree at 1.43-1.48 GB.
    """
    if scope == "night":
        release_free_memory()
        if _HEAP["keep"]:
            _thresholds(_DYNAMIC_CEILING, 2 * _DYNAMIC_CEILING)


def release_after(scope: str) -> None:
    """After a unit of ``scope``: give its free heap memory back, at once or once idle.

    A night-wide unit's goes back at once: the night's next unit is another
    stage's (catalogue, astrometry, zero point follow one another), usually
    run by the other worker.  A per-stretch unit's is returned once the
    process idles (:func:`release_when_idle`): the next unit, queued
    already, reuses it.
    """
    if scope == "night":
        release_free_memory()
        if _HEAP["keep"]:
            _thresholds(LARGE_BLOCKS, LARGE_BLOCKS)
    release_when_idle()


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
