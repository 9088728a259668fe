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

Once a worker's warm-up is done, the next unit to end there moves what the
process then holds (the libraries' hundreds of thousands of objects) out of the garbage
collector's reach (:func:`settle_after_warm`): a full collection walked
them all, ~0.1 s of CPU, about once per unit.
"""

from __future__ import annotations

import gc
import importlib
import logging
import threading
from collections.abc import Sequence

__all__ = ["settle_after_warm", "start_warming", "wait_warm", "warm_plan"]

log = logging.getLogger(__name__)

#: Stage name -> set once its warm-up in this process is done (or failed).
_READY: dict[str, threading.Event] = {}
#: Whether :func:`settle_after_warm` is to freeze this process's objects
#: (a worker's, set by ``start_warming(settle=True)``), and whether it has.
_SETTLE = {"wanted": False, "done": False}


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


def _warm(plan: Sequence[tuple[str, tuple[str, ...]]]) -> None:
    for name, entries in plan:
        try:
            for entry in entries:
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
    """Wait until this process's warm-up has loaded what ``stage`` declares (if it warms it)."""
    ready = _READY.get(stage)
    if ready is not None:
        ready.wait()


def settle_after_warm() -> bool:
    """Freeze this process's objects for the garbage collector once its warm-up is done.

    Called between units (a unit's own objects are freed by then): when
    every stage's warm-up in this process has finished, collect once and
    :func:`gc.freeze` what is left (modules, compiled kernels, cached
    tables), which later collections then skip.  Frozen objects are still
    freed when no longer referenced; only a cycle among them would stay.
    Returns whether it froze now: once per worker process at most, never
    while a warm-up is running, when there was none, or in a process that
    did not ask for it (``start_warming(settle=True)``).
    """
    if not _SETTLE["wanted"] or _SETTLE["done"] or not _READY:
        return False
    if not all(event.is_set() for event in _READY.values()):
        return False
    gc.collect()
    gc.freeze()
    _SETTLE["done"] = True
    return True
