"""A process's warm-up loads only while no unit runs there, or while the units wait for it.

A unit that runs beside a thread busy importing gets Python's lock back only
after each switch interval, every time it gives the lock up (reading a file,
a numpy call): the warm-up must not run beside it.  Self-consistency checks
of :mod:`pipeline.runner._warm` with a recorded stand-in for the loads.
"""

from __future__ import annotations

import threading
import time

import pytest

import pipeline.runner._warm as _warm

#: Seconds a check waits for the warm-up thread to do (or not do) something:
#: far above a thread switch (ms) on a loaded machine, short for a test.
PATIENCE = 2.0

#: Two stages, each with one thing to load.
PLAN = (("first", ("first-load",)), ("second", ("second-load",)))


@pytest.fixture
def loads(monkeypatch) -> list[str]:
    """The entries the warm-up loads, in order (nothing is imported)."""
    loaded: list[str] = []
    monkeypatch.setattr(_warm, "_load", loaded.append)
    monkeypatch.setattr(_warm, "_READY", {})
    monkeypatch.setattr(_warm, "_UNITS", {"running": 0, "ended": float("-inf")})
    monkeypatch.setattr(_warm, "_WAITING", {})
    monkeypatch.setattr(_warm, "_SETTLE", {"wanted": False, "done": False, "stages": set()})
    return loaded


def _in_thread(function) -> threading.Thread:
    thread = threading.Thread(target=function, daemon=True)
    thread.start()
    return thread


def test_the_warm_up_waits_while_a_unit_runs_and_goes_on_after_it(loads):
    with _warm.unit_running():
        thread = _warm.start_warming(PLAN)
        time.sleep(PATIENCE / 4)
        assert loads == []  # a unit of a stage with nothing to load runs alone
    thread.join(PATIENCE)
    assert not thread.is_alive() and loads == ["first-load", "second-load"]


def test_the_warm_up_goes_on_while_the_running_unit_waits_for_its_share(loads):
    with _warm.unit_running():
        thread = _warm.start_warming(PLAN)
        waiting = _in_thread(lambda: _warm.wait_warm("second"))
        waiting.join(PATIENCE)
        assert not waiting.is_alive(), "the unit waits for a warm-up that waits for the unit"
        assert loads == ["first-load", "second-load"]
    thread.join(PATIENCE)
    assert not thread.is_alive()


def test_after_its_share_the_unit_runs_alone_again(loads):
    with _warm.unit_running():
        thread = _warm.start_warming(PLAN)
        _in_thread(lambda: _warm.wait_warm("first")).join(PATIENCE)
        assert loads[:1] == ["first-load"]
        time.sleep(PATIENCE / 4)
        assert loads == ["first-load"]  # the unit computes: "second" waits
    thread.join(PATIENCE)
    assert loads == ["first-load", "second-load"]


def test_a_unit_that_follows_another_soon_keeps_the_warm_up_paused(loads):
    # A worker's next task is queued: it starts milliseconds after the last
    # one ended, well within the grace (GRACE, 0.1 s), and no load starts in
    # the gap to run beside it.
    with _warm.unit_running():
        thread = _warm.start_warming(PLAN)
        time.sleep(PATIENCE / 20)
    time.sleep(_warm.GRACE / 10)
    with _warm.unit_running():
        time.sleep(PATIENCE / 4)
        assert loads == []
    thread.join(PATIENCE)
    assert loads == ["first-load", "second-load"]
