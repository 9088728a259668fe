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
"""

from __future__ import annotations

import importlib
import logging
import threading
from collections.abc import Sequence

__all__ = ["start_warming", "wait_warm", "warm_plan"]

log = logging.getLogger(__name__)

#: Stage name -> set once its warm-up in this process is done (or failed).
_READY: dict[str, threading.Event] = {}


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


def start_warming(plan: Sequence[tuple[str, tuple[str, ...]]]) -> threading.Thread | None:
    """Start loading ``plan`` (from :func:`warm_plan`) in a daemon thread of this process.

    Returns the thread, or None if there is nothing to load.  Called once per
    worker process, as it starts; a unit of a stage then waits for its share
    (:func:`wait_warm`).
    """
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
