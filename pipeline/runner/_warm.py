"""A worker's warm-up: what the planned stages load on first use, loaded in the background.

The stages import their heavy libraries (scipy, photutils, numba) in their
functions, and read per-process state (the IERS tables, compiled kernels) on
first use, so that a run pays only for the stages it runs.  A worker that
waits for all that when its first unit of a stage arrives puts it on the
run's critical path, once per worker and stage.  Instead, a worker of the
local pool or of the run's dask cluster starts a thread as it starts
(:func:`start_warming`) that loads, stage by stage in plan order, what each
planned stage declares in ``Stage.warm``; a unit first waits until its own
stage's share is loaded (:func:`wait_warm`), so that the two threads never
load the same thing at once, and then runs while the thread goes on with the
stages after it.  Nothing loaded changes what a stage computes.

The thread loads only while no unit runs in the process, or while every
unit that runs waits for it (:func:`unit_running`): Python's lock lets one
thread run at a time, and a unit that gives it up often (reading a file,
a numpy call) gets it back from a thread busy importing only after the
switch interval (5 ms), again and again: a unit that reads sixteen raw
blocks took three times as long beside a busy thread.  A worker's
warm-up so fills the time the worker waits for work (its first unit of a
stage waits for that stage's share, as before), and stays off the units
that the run waits for (ingest and the column statistics, which the night
waits for before it can calibrate).

After the first unit of each stage in a worker, and once its warm-up is
done, the worker moves what it then holds (the libraries' hundreds of
thousands of objects) out of the garbage collector's reach
(:func:`settle_after_warm`): a full collection walked them all, 0.17-0.24 s
of CPU, about once per unit.
"""

from __future__ import annotations

import contextlib
import gc
import importlib
import logging
import threading
import time
from collections.abc import Iterator, Sequence

__all__ = [
    "seconds_idle",
    "settle_after_warm",
    "start_warming",
    "unit_running",
    "wait_warm",
    "warm_plan",
]

log = logging.getLogger(__name__)

#: Stage name -> set once its warm-up in this process is done (or failed).
_READY: dict[str, threading.Event] = {}
#: Whether :func:`settle_after_warm` is to freeze this process's objects
#: (a worker's, set by ``start_warming(settle=True)``), whether it has once
#: the warm-up was done, and the stages after whose first unit it has.
_SETTLE = {"wanted": False, "done": False, "stages": set()}
#: Seconds of no unit running, after a unit ended, before the warm-up loads again.
GRACE = 0.1
#: Units running in this process (and when the last one ended, on
#: :func:`time.monotonic`'s clock), and per stage how many of them wait for its
#: share of the warm-up: the warm-up loads only while every unit that runs
#: waits for a share not loaded yet (see :func:`unit_running`).
_UNITS = {"running": 0, "ended": float("-inf")}
_WAITING: dict[str, int] = {}
_UNITS_CHANGED = threading.Condition()


def warm_plan(stages: Sequence) -> tuple[tuple[str, tuple[str, ...]], ...]:
    """``((stage name, its warm entries not listed before), ...)`` in plan order."""
    seen: set[str] = set()
    plan = []
    for stage in stages:
        entries = tuple(e for e in dict.fromkeys(getattr(stage, "warm", ())) if e not in seen)
        seen.update(entries)
        plan.append((stage.name, entries))
    return tuple(plan)


def _load(entry: str) -> None:
    module, _, function = entry.partition(":")
    target = importlib.import_module(module)
    if function:
        getattr(target, function)()


def _idle() -> bool:
    """Whether every unit running in this process waits for a share not loaded yet."""
    waiting = sum(n for stage, n in _WAITING.items() if not _READY[stage].is_set())
    return _UNITS["running"] <= waiting


def _wait_until_idle() -> None:
    """Return once the warm-up may load its next entry (see :func:`unit_running`).

    When a unit has just ended, the next one usually follows within
    milliseconds (a worker's next task is queued already): the warm-up waits
    :data:`GRACE` seconds of no unit first, so that a load does not start in
    the gap and run beside the next unit.  A unit that waits for a share is
    not kept waiting.
    """
    with _UNITS_CHANGED:
        while True:
            _UNITS_CHANGED.wait_for(_idle)
            if _UNITS["running"] or time.monotonic() - _UNITS["ended"] >= GRACE:
                return
            _UNITS_CHANGED.wait(GRACE)


def _warm(plan: Sequence[tuple[str, tuple[str, ...]]]) -> None:
    for name, entries in plan:
        try:
            for entry in entries:
                _wait_until_idle()
                try:
                    _load(entry)
                except Exception as exc:  # the unit that needs it reports the error
                    log.debug("warm-up of %s for stage %s failed: %s", entry, name, exc)
        finally:
            _READY[name].set()


def start_warming(
    plan: Sequence[tuple[str, tuple[str, ...]]], *, settle: bool = False
) -> threading.Thread | None:
    """Start loading ``plan`` (from :func:`warm_plan`) in a daemon thread of this process.

    Returns the thread, or None if there is nothing to load.  Called once per
    worker process, as it starts; a unit of a stage then waits for its share
    (:func:`wait_warm`).  ``settle``: a worker process, whose objects
    :func:`settle_after_warm` may freeze once the warm-up is done (not the
    run's own process, which goes on after the units).
    """
    _SETTLE["wanted"] = settle
    plan = [(name, tuple(entries)) for name, entries in plan]
    if not any(entries for _, entries in plan):
        return None
    for name, _ in plan:
        _READY.setdefault(name, threading.Event())
    thread = threading.Thread(target=_warm, args=(plan,), name="zdrift-warm", daemon=True)
    thread.start()
    return thread


def wait_warm(stage: str) -> None:
    """Wait until this process's warm-up has loaded what ``stage`` declares (if it warms it).

    Called by a unit within :func:`unit_running`: the warm-up goes on while
    the unit waits.
    """
    ready = _READY.get(stage)
    if ready is None or ready.is_set():
        return
    _count(_WAITING, stage, +1)
    try:
        ready.wait()
    finally:
        _count(_WAITING, stage, -1)


@contextlib.contextmanager
def unit_running() -> Iterator[None]:
    """Mark a unit as running in this process: the warm-up pauses meanwhile.

    The warm-up finishes the load it is in and starts the next one only when
    no unit runs, or while all that run wait for it (:func:`wait_warm`).
    """
    _count(_UNITS, "running", +1)
    try:
        yield
    finally:
        with _UNITS_CHANGED:
            _UNITS["ended"] = time.monotonic()
        _count(_UNITS, "running", -1)


def seconds_idle() -> float:
    """Seconds since this process's last unit ended (see :func:`unit_running`); 0 while one runs.

    Infinite before the first unit.
    """
    with _UNITS_CHANGED:
        if _UNITS["running"]:
            return 0.0
        return time.monotonic() - _UNITS["ended"]


def _count(counts: dict[str, int], what: str, change: int) -> None:
    with _UNITS_CHANGED:
        counts[what] = counts.get(what, 0) + change
        _UNITS_CHANGED.notify_all()


def settle_after_warm(stage: str) -> bool:
    """Freeze this process's objects for the garbage collector when it has loaded more.

    Called between units (a unit's own objects are freed by then), after a
    unit of ``stage``: after the first unit of each stage in this process
    (which has imported the libraries the stage computes with and loaded its
    compiled code, and waited for its share of the warm-up), and once every
    stage's warm-up has finished, collect once and :func:`gc.freeze` what is
    left (modules, compiled kernels, cached tables), which later collections
    then skip.  Freezing only once the whole warm-up was done left the
    workers unfrozen through a night's per-stretch stages (the warm-up of
    the night-wide stages after them loads only while a worker idles): on
    the 4096 x 16 x 2048 night a full collection then walked ~280,000
    objects in 28 of the 32 detect units, 0.17-0.24 s each.  Frozen objects
    are still freed when no longer referenced; only a cycle among them would
    stay.  Returns whether it froze now; never in a process that did not ask
    for it (``start_warming(settle=True)``).
    """
    if not _SETTLE["wanted"]:
        return False
    if stage in _SETTLE["stages"]:
        if _SETTLE["done"] or not _READY:
            return False
        if not all(event.is_set() for event in _READY.values()):
            return False
        _SETTLE["done"] = True
    _SETTLE["stages"].add(stage)
    gc.collect()
    gc.freeze()
    return True
