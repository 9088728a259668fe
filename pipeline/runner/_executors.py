"""Where units run: in this process, on a local process pool, or on dask.

Only the runner uses this module; stages never see an executor.  Each
executor maps :func:`pipeline.runner._unit.execute_unit` over a batch of tasks and
yields outcomes as they complete.  A task whose worker does not report back
(the process died, the cluster lost it) yields a failed outcome instead of
stopping the batch.

* ``serial``: one after the other in this process (debugging, profiling).
* ``local``: :class:`concurrent.futures.ProcessPoolExecutor` with
  ``run.workers`` processes started with ``spawn``: fresh interpreters, safe
  when this process has threads (unlike ``fork``), the same on every OS, and
  seeing the environment as it is when the run starts (a fork server would
  keep the environment of its own start).  The pool is created on first use,
  with all its workers at once (each imports the modules of the stages the
  run plans as it starts, see :meth:`LocalPoolExecutor.warm`; the libraries a
  stage computes with are imported by its functions, when a unit of it first
  runs there), and reused by later stages of the run.  It has no more
  workers than the run has units to run at once (:meth:`Executor.fit`).  A
  run with one unit at a time (a night of one stretch, night-scoped stages
  only, one worker) runs its units in this process instead, as ``serial``
  does, with the warm-up in a thread of this process: a worker would cost a
  second interpreter's start and imports (about 0.4 s of CPU, on the run's
  critical path) and run nothing alongside; such a run gives up the pool's
  isolation (a unit that kills its process ends the run).  When the run ends
  with no unit in progress, the idle workers are terminated rather than
  waited for: a worker's interpreter takes seconds to exit with the
  libraries it loaded, and it has nothing left to write.  The workers get
  one BLAS thread each unless the run's environment sets the count
  (:data:`WORKER_THREAD_LIMITS`), and so do the units a run computes in its
  own process (here and ``serial``, :func:`threads_of_a_worker`): a product
  does not depend on the process that made it.  A worker keeps its
  per-stretch units' large blocks in its heap for the next unit
  (:func:`pipeline.runner._heap.keep_large_blocks`).
* ``dask``: a :class:`distributed.Client` connected to ``run.scheduler``, or,
  without a scheduler address, to a ``distributed.LocalCluster`` of
  ``run.workers`` processes started for the run.  Workers must see the same
  file system as this process (they read inputs and write products).  The
  cluster started for the run listens on the loopback interface only, serves
  no dashboard and no HTTP routes (its HTTP listener takes a random loopback
  port and answers nothing), and uses a per-run TLS certificate when the
  ``cryptography`` package is installed (``Security.temporary()``); without
  it, any local user could submit work to it while it runs.  A unit dask
  gave up on because workers died while they held it is run again alone
  (:meth:`DaskExecutor._alone`), as the local pool retries the units of a
  broken pool: only a unit that kills its worker by itself fails.

Workers of the local pool and of the dask cluster started for the run end
when the run that started them dies (even by ``kill -9``): on Linux through
the parent-death signal (``prctl(PR_SET_PDEATHSIG)``), everywhere through a
watchdog thread that notices the change of parent process within
:data:`WATCH_INTERVAL` seconds.  Both start only once a worker has imported
the pipeline (seconds on a loaded machine), so on Linux a tiny reaper process
also watches the run: when the run's end of a pipe closes, it kills every
process that carries the run's mark in its environment (see
:class:`Reaper`).

Without ``run.workers``, the number of workers is the number of cores,
lowered so that the workers fit the memory available (see
:func:`default_workers`); the choice is logged.
"""

from __future__ import annotations

import contextlib
import ctypes
import importlib
import logging
import multiprocessing
import os
import pickle
import queue
import signal
import subprocess
import sys
import threading
import time
import uuid
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, as_completed, wait
from concurrent.futures.process import BrokenProcessPool
from typing import Any

from pipeline._offline import configure_offline
from pipeline._threads import n_cpus, report_spare_cores
from pipeline.config import RunSection
from pipeline.runner._heap import keep_large_blocks
from pipeline.runner._warm import start_warming

__all__ = ["Executor", "available_memory", "default_workers", "make_executor", "worker_memory"]

log = logging.getLogger(__name__)

Outcome = Any
#: ``((stage name, what it loads on first use), ...)``, see :func:`pipeline.runner._warm.warm_plan`.
WarmPlan = Sequence[tuple[str, tuple[str, ...]]]
OnError = Callable[[Any, str], Outcome]

_SPAWN = multiprocessing.get_context("spawn")

#: Thread counts the local pool's workers get for BLAS (numpy's and scipy's
#: OpenBLAS, or MKL), unless this process's environment sets them: one
#: each, as dask's nannies give theirs.  The pool's workers are the
#: parallelism, one per core; a BLAS that starts a thread per core in every
#: worker has its threads wait for cores the other workers hold (detect's
#: compiled fits call BLAS for every group: on a busy machine a night's detect
#: units took from 1.0 to 13 times their time with one thread).  OpenMP's
#: count (``OMP_NUM_THREADS``) is left alone: pyarrow sizes its thread pool
#: by it, which reads the night-wide stages' tables.
WORKER_THREAD_LIMITS = {"OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
_BROKEN = object()  # marker: the task's pool broke before it reported
_DIED = "its worker process died (killed, or out of memory); see the system log"
#: Seconds the run's own dask cluster may have no worker at all before its
#: waiting units fail (a worker that died is restarted within seconds; one
#: whose restart failed is not, and dask would wait for it forever).
NO_WORKERS_TIMEOUT = 60.0
_NO_WORKERS = (
    "the run's dask cluster has had no worker for {:.0f} s (each one died and was not "
    "restarted: killed, out of memory, or too slow to start); see the log"
)

#: Seconds between two checks of a worker's watchdog for the death of its run.
WATCH_INTERVAL = 0.2
_PR_SET_PDEATHSIG = 1  # from <linux/prctl.h>


def _watch_parent(parent_pid: int) -> None:
    while True:
        time.sleep(WATCH_INTERVAL)
        if os.getppid() != parent_pid:  # the run died: this process was re-parented
            os._exit(1)


def end_with_parent(parent_pid: int, death_signal: bool = True) -> None:
    """Make this (worker) process end when its parent, the run, dies.

    Parameters
    ----------
    parent_pid : int
        Process id of the run that started this process.
    death_signal : bool
        Also ask Linux to send SIGKILL at the parent's death (valid only when
        the thread that started this process lives as long as the run).
    """
    if death_signal and sys.platform.startswith("linux"):
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
        except (OSError, AttributeError):  # no libc prctl: the watchdog still works
            pass
    if os.name != "posix":  # the parent id of a process does not change there
        return
    if os.getppid() != parent_pid:  # the run died while this process started
        os._exit(1)
    threading.Thread(
        target=_watch_parent, args=(parent_pid,), name="zdrift-watchdog", daemon=True
    ).start()


#: Environment variable that marks the worker processes of one run (value: a token).
RUN_MARK = "ZDRIFT_RUN_MARK"

# The reaper: waits for EOF on stdin (the run ended, normally or killed), then
# kills the processes whose environment carries the run's mark.  Plain Python
# without imports of ours, so it starts in milliseconds.  The multiprocessing
# resource tracker is spared: it ends by itself once the workers are gone and
# frees what they leaked.
_REAPER = """
import os, signal, sys, time
signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C reaches the run, which closes the pipe
mark = sys.argv[1].encode()
# b"done": the run closed its pool itself; EOF alone: the run died.  Then look
# again for a while: a process may have been between fork and exec.
passes = 1 if sys.stdin.buffer.read() == b"done" else 10
for attempt in range(passes):
    for name in os.listdir("/proc"):
        if not name.isdigit() or int(name) == os.getpid():
            continue
        try:
            with open("/proc/%s/environ" % name, "rb") as stream:
                if mark not in stream.read().split(b"\\0"):
                    continue
            with open("/proc/%s/cmdline" % name, "rb") as stream:
                if b"resource_tracker" in stream.read():
                    continue
            os.kill(int(name), signal.SIGKILL)
        except OSError:
            pass
    if attempt + 1 < passes:  # the run waits for this process to end
        time.sleep(0.1)
"""


class Reaper:
    """A process that kills the run's workers when the run ends, however it ends.

    While a reaper is active, processes started by this one carry
    ``ZDRIFT_RUN_MARK=<token>`` in their environment (the run's own
    environment, as the kernel shows it, does not).  Linux only (reads
    ``/proc``); elsewhere it does nothing and the workers' watchdogs remain.
    """

    def __init__(self) -> None:
        self._process: subprocess.Popen | None = None
        self.mark = f"{RUN_MARK}={uuid.uuid4().hex}"

    def start(self) -> None:
        """Start the reaper and mark the processes started from now on."""
        if self._process is not None or not os.path.isdir("/proc/self"):
            return
        try:
            self._process = subprocess.Popen(
                [sys.executable, "-I", "-S", "-c", _REAPER, self.mark],
                stdin=subprocess.PIPE,
                env={k: v for k, v in os.environ.items() if k != RUN_MARK},
            )
        except OSError as exc:  # the watchdogs still work
            log.warning("could not start the worker reaper (%s)", exc)
            return
        os.environ[RUN_MARK] = self.mark.partition("=")[2]

    def stop(self) -> None:
        """After the workers are gone: stop marking processes and end the reaper."""
        if self._process is None:
            return
        os.environ.pop(RUN_MARK, None)
        self._process.stdin.write(b"done")
        self._process.stdin.close()
        self._process.wait()
        self._process = None


@contextlib.contextmanager
def _environment(defaults: dict[str, str]) -> Iterator[None]:
    """Within the block, the variables of ``defaults`` this process's environment lacks are set."""
    added = [name for name in defaults if name not in os.environ]
    os.environ.update({name: defaults[name] for name in added})
    try:
        yield
    finally:
        for name in added:
            os.environ.pop(name, None)


@contextlib.contextmanager
def threads_of_a_worker() -> Iterator[None]:
    """Within the block, BLAS computes with the threads a pool worker has.

    A worker starts with :data:`WORKER_THREAD_LIMITS` (one BLAS thread) unless
    the run's environment sets the counts; this process loaded its BLAS with
    one thread per core.  OpenBLAS's results change in their last bits with
    its thread count (the astrometry's transparency fit moved ~1e-10 between
    a unit computed here and in a worker), so the units a run computes here
    (one unit at a time, the serial executor) use a worker's count: a product
    is the same whichever process made it.  Nothing is limited when the
    environment sets a count (this process then has it too).
    """
    if any(name in os.environ for name in WORKER_THREAD_LIMITS):
        yield
        return
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        yield


def _unpicklable(task: Any) -> str | None:
    """Why ``task`` cannot be sent to another process, or None if it can."""
    try:
        pickle.dumps(task)
    except Exception as exc:
        return (
            f"the unit cannot be sent to a worker process ({type(exc).__name__}: {exc}); a "
            "stage's run function and options class must be defined at module level of an "
            "importable module, and its options must hold plain values"
        )
    return None


#: The astropy subpackages the stages compute with.  The stage modules import
#: them in their functions, so that reading a config, ``zdrift status`` and a
#: run with every product up to date do without them (~0.25 s of CPU on a
#: fast day); a worker imports them as it starts, with the stage modules.
WORKER_LIBRARIES = (
    "astropy.units",
    "astropy.table",
    "astropy.io.fits",
    "astropy.time",
    "astropy.stats",
    "astropy.wcs",
    "astropy.coordinates",
)


def prepare_worker(modules: Sequence[str], plan: WarmPlan) -> None:
    """Import ``modules``, keep astropy offline, and start the warm-up of ``plan``.

    Importing the stage modules as the worker starts, rather than when its
    first unit is unpickled, lets every worker warm up at once, and with them
    :data:`WORKER_LIBRARIES` (as the stage modules did when they imported
    astropy as they were imported).  The heavy
    libraries a stage computes with are imported by its functions; a thread
    loads those of the planned stages meanwhile (:mod:`pipeline.runner._warm`).
    The process is the run's, so astropy stays offline in all of it (the
    warm-up's thread too).  An import that fails is left for the unit that
    needs it to report.
    """
    for module in (*WORKER_LIBRARIES, *modules):
        with contextlib.suppress(Exception):
            importlib.import_module(module)
    configure_offline()
    start_warming(plan, settle=True)


def _start_worker(parent_pid: int, modules: Sequence[str], plan: WarmPlan = (), spare=None) -> None:
    """Initializer of a pool worker: end with the run, keep large blocks, :func:`prepare_worker`.

    The worker's heap keeps the blocks of its units' planes for reuse
    (:func:`pipeline.runner._heap.keep_large_blocks`).  Not done in the
    workers of a dask cluster, whose scheduler and nannies leave no room for
    it in the process tree's memory: there it made the long benchmark night
    1.03x faster and the tree peak at 1.54-1.57 GB RSS instead of 1.50-1.52.
    ``spare``: the shared integer in which the run publishes the cores its
    workers leave idle (:meth:`LocalPoolExecutor._units_at_work`), what the
    worker's units see as :func:`pipeline._threads.spare_cores`.
    """
    end_with_parent(parent_pid)
    keep_large_blocks()
    if spare is not None:
        report_spare_cores(lambda: spare.value)
    prepare_worker(modules, plan)


def _computed_here(fn: Callable[[Any], Outcome], task: Any) -> Outcome:
    """``fn(task)`` in this process, with a worker's BLAS threads (:func:`threads_of_a_worker`).

    The unit is the only one the run computes meanwhile: it may share its
    work with every other core (:func:`pipeline._threads.spare_cores`).
    """
    report_spare_cores(lambda: n_cpus() - 1)
    try:
        with threads_of_a_worker():
            return fn(task)
    finally:
        report_spare_cores(None)


def _ready() -> None:
    """A task that does nothing: submitted once per worker to start them all."""


class Executor:
    """Runs ``fn`` over tasks; a context manager that frees its workers on exit."""

    #: Whether workers are other processes (their log records must be shipped back).
    remote = False

    def warm(self, modules: Sequence[str], plan: WarmPlan = ()) -> None:
        """Name the modules workers import as they start, and what they load meanwhile.

        Called before the first batch; ``plan`` is
        :func:`pipeline.runner._warm.warm_plan` of the planned stages.
        """

    def fit(self, units_at_once: int | None) -> None:
        """Start no more workers than ``units_at_once`` (None: not known, all of them).

        Called before the first batch by the run that made this executor; a
        night of two stretches then runs in two workers instead of paying the
        start-up of more, which have nothing to do but compete for cores, and
        the local pool runs a night of one stretch in this process.
        """

    def flow(
        self,
        fn: Callable[[Any], Outcome],
        tasks: Sequence[Any],
        on_error: OnError,
        on_done: Callable[[Outcome], Sequence[Any]],
        key: Callable[[Any], Any] | None = None,
    ) -> None:
        """Run ``fn`` over ``tasks`` and over the tasks ``on_done(outcome)`` returns.

        ``on_done`` is called in this process for every outcome, as it comes;
        the tasks it returns (those its outcome made ready) join the ready
        ones.  Here one at a time, the smallest ``key(task)`` first; the local
        pool starts each ready task as soon as a worker is free (the smallest
        key first), dask as soon as it is ready (the scheduler's order).
        """
        ready = list(tasks)
        while ready:
            if key is not None:
                ready.sort(key=key)
            ready.extend(on_done(_computed_here(fn, ready.pop(0))))

    def map(self, fn: Callable[[Any], Outcome], tasks: Sequence[Any], on_error: OnError):
        """Yield ``fn(task)`` for every task, in completion order."""
        for task in tasks:
            yield _computed_here(fn, task)

    def close(self) -> None:
        """Release workers."""

    def __enter__(self) -> Executor:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()


class LocalPoolExecutor(Executor):
    """A process pool on this machine, workers started with 'spawn'."""

    remote = True

    def __init__(self, workers: int):
        self.workers = workers
        self._pool: ProcessPoolExecutor | None = None
        self._reaper = Reaper()
        self._modules: tuple[str, ...] = ()
        self._plan: WarmPlan = ()
        self._futures: list = []
        self._starting = threading.Lock()  # several nights' runs may share the pool
        self._size = workers  # workers to start: at most ``workers``, see fit()
        self.remote = True  # False: one unit at a time, run in this process (fit())
        self._warming: threading.Thread | bool = False  # this process's warm-up (not remote)
        # cores the workers leave idle, read by them, and the units at work per
        # batch or flow of this process (nights may share the pool; _units_at_work)
        self._spare = _SPAWN.RawValue("i", 0)
        self._at_work: dict[object, int] = {}
        self._at_work_lock = threading.Lock()

    def warm(self, modules: Sequence[str], plan: WarmPlan = ()) -> None:
        self._modules, self._plan = tuple(modules), tuple(plan)

    def fit(self, units_at_once: int | None) -> None:
        if self._pool is None:
            if self.workers <= 1 or (units_at_once is not None and units_at_once <= 1):
                self._size, self.remote = 1, False  # see the module docstring
                log.info("one unit at a time: the units run in this process, not in a worker")
            else:
                self._size = _fitted(self.workers, units_at_once)

    def _here(self) -> None:
        """Before units run in this process: start its warm-up (once)."""
        if self._warming is False:
            self._warming = start_warming(self._plan) or True

    def map(self, fn, tasks, on_error) -> Iterator[Outcome]:
        if not self.remote:
            if tasks:
                self._here()
            yield from super().map(fn, tasks, on_error)
            return
        # When a worker dies (killed, out of memory) the whole pool breaks and
        # every unfinished task fails with it.  Those tasks are retried one at
        # a time in a fresh pool, so only a task that kills its worker by
        # itself is reported as failed.
        caught = []
        for task, outcome in self._batch(fn, tasks, on_error):
            if outcome is _BROKEN:
                caught.append(task)
            else:
                yield outcome
        for task in caught:
            for _, outcome in self._batch(fn, [task], on_error):
                yield on_error(task, _DIED) if outcome is _BROKEN else outcome

    def _batch(self, fn, tasks, on_error) -> Iterator[tuple[Any, Outcome]]:
        sendable = []
        for task in tasks:
            reason = _unpicklable(task)
            if reason is None:
                sendable.append(task)
            else:
                yield task, on_error(task, reason)
        tasks = sendable
        if not tasks:
            return
        futures = {self._start().submit(fn, task): task for task in tasks}
        self._futures = list(futures)
        broken = False
        with self._units_at_work() as publish:
            publish(len(futures))
            for left, future in enumerate(as_completed(futures), 1):
                publish(len(futures) - left)
                task = futures[future]
                try:
                    yield task, future.result()
                except BrokenProcessPool:
                    broken = True
                    yield task, _BROKEN
                except Exception as exc:  # e.g. the task could not be pickled
                    yield task, on_error(task, f"{type(exc).__name__}: {exc}")
        if broken:  # a broken pool accepts no more work; start afresh next time
            self.close()

    def flow(self, fn, tasks, on_error, on_done, key=None) -> None:
        if not self.remote:
            if tasks:
                self._here()
            super().flow(fn, tasks, on_error, on_done, key)
            return
        with self._units_at_work() as publish:
            self._flow(fn, tasks, on_error, on_done, key, publish)

    def _flow(self, fn, tasks, on_error, on_done, key, publish) -> None:
        """:meth:`flow` on the pool; ``publish(n)``: ``n`` units are at work."""
        ready, pending, caught = list(tasks), {}, []
        while ready or pending or caught:
            if caught and not pending:  # the pool broke: each task it held again, alone
                task = caught.pop(0)
                for _, outcome in self._batch(fn, [task], on_error):
                    ready.extend(on_done(on_error(task, _DIED) if outcome is _BROKEN else outcome))
                continue
            if key is not None:
                ready.sort(key=key)
            # one task queued beyond the busy workers, so that none waits for this process
            while ready and not caught and len(pending) <= self._size:
                task = ready.pop(0)
                reason = _unpicklable(task)
                if reason is not None:
                    ready.extend(on_done(on_error(task, reason)))
                    continue
                pending[self._start().submit(fn, task)] = task
            self._futures = list(pending)
            publish(len(pending))
            if not pending:
                continue
            done, _ = wait(pending, return_when=FIRST_COMPLETED)
            for future in done:
                task = pending.pop(future)
                try:
                    outcome = future.result()
                except BrokenProcessPool:
                    caught.append(task)
                    continue
                except Exception as exc:
                    outcome = on_error(task, f"{type(exc).__name__}: {exc}")
                ready.extend(on_done(outcome))
            if caught and not pending:  # a broken pool accepts no more work
                self.close()

    @contextlib.contextmanager
    def _units_at_work(self) -> Iterator[Callable[[int], None]]:
        """Within the block, ``publish(n)`` tells the workers that the block has
        ``n`` units at work (none after it), and so how many cores they leave idle.

        A unit's work shared with a thread (:func:`pipeline._threads.spare_cores`)
        then fills the cores of the workers that wait for it: the last
        stretches of a flow, with nothing else ready.  ``n`` counts the tasks
        submitted and not yet done, at most a worker each (one may wait in the
        queue, see :meth:`flow`), over the blocks of every night that shares
        the pool.
        """
        block = object()

        def publish(units: int) -> None:
            with self._at_work_lock:
                self._at_work[block] = units
                busy = min(sum(self._at_work.values()), self._size)
                self._spare.value = max(n_cpus() - busy, 0)

        try:
            yield publish
        finally:
            publish(0)
            with self._at_work_lock:
                self._at_work.pop(block, None)

    def _start(self) -> ProcessPoolExecutor:
        """The pool, started (all its workers at once) if it is not running."""
        with self._starting:
            return self._start_locked()

    def _start_locked(self) -> ProcessPoolExecutor:
        if self._pool is None:
            self._reaper.start()
            self._pool = ProcessPoolExecutor(
                max_workers=self._size,
                mp_context=_SPAWN,
                initializer=_start_worker,
                initargs=(os.getpid(), self._modules, self._plan, self._spare),
            )
            # The pool starts a worker per task submitted while none is idle:
            # start them all now, so that they import in parallel (a worker
            # takes this process's environment as it starts).
            with _environment(WORKER_THREAD_LIMITS):
                for _ in range(self._size):
                    self._pool.submit(_ready)
            log.debug("started a local pool of %d worker processes", self._size)
        return self._pool

    def close(self) -> None:
        if isinstance(self._warming, threading.Thread):
            # Its loads may change astropy's settings for a while (offline, see
            # pipeline._offline): the run does not end before they are restored.
            self._warming.join()
            self._warming = True
        if self._pool is not None:
            if all(future.done() for future in self._futures):
                # Idle workers: end them now instead of waiting for their exit.
                processes = list((self._pool._processes or {}).values())
                self._pool.shutdown(wait=False, cancel_futures=True)
                for process in processes:
                    process.terminate()
                for process in processes:
                    process.join()
            else:  # e.g. interrupted: let the units in progress finish
                self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None
        self._reaper.stop()


class _NoWorkersError(RuntimeError):
    """The run's own dask cluster has lost every worker for good."""


class DaskExecutor(Executor):
    """A dask.distributed client on a given scheduler or on a LocalCluster of its own."""

    remote = True

    def __init__(self, scheduler: str | None, workers: int):
        self.scheduler = scheduler
        self.workers = workers
        self._client = None
        self._cluster = None
        self._reaper = Reaper()
        self._modules: tuple[str, ...] = ()
        self._plan: WarmPlan = ()
        self._futures: list = []  # of the last batch
        self._size = workers  # workers of the cluster started for the run, see fit()

    def fit(self, units_at_once: int | None) -> None:
        if self._client is None:
            self._size = _fitted(self.workers, units_at_once)

    def warm(self, modules: Sequence[str], plan: WarmPlan = ()) -> None:
        # only the workers of the cluster started for the run: those of a
        # scheduler given by address are not the run's to set up
        self._modules, self._plan = tuple(modules), tuple(plan)

    def _connect(self):
        import distributed

        if self._client is None:
            if self.scheduler is None:
                self._reaper.start()
                self._cluster = start_local_cluster(self._size)
                address = self._cluster.scheduler_address
                security = self._cluster.security
                self._client = distributed.Client(address, set_as_default=False, security=security)
                from pipeline.runner._daskplugin import EndWithRun

                self._client.register_plugin(EndWithRun(os.getpid(), self._modules, self._plan))
            else:
                address = self.scheduler
                self._client = distributed.Client(address, set_as_default=False)
            log.info("dask scheduler %s", address)
        return self._client

    def map(self, fn, tasks, on_error) -> Iterator[Outcome]:
        if not tasks:
            return

        client = self._connect()
        batch = uuid.uuid4().hex[:8]
        futures = {}
        for task in tasks:
            reason = _unpicklable(task)
            if reason is not None:
                yield on_error(task, reason)
                continue
            key = f"{task.stage.name}-{task.unit}-{batch}"
            futures[client.submit(fn, task, pure=False, key=key)] = task
        self._futures = list(futures)
        pending = set(futures)
        killed = []
        try:
            for future in self._completed(client, pending):
                try:
                    yield future.result()
                except Exception as exc:  # KilledWorker, lost connection, ...
                    if _killed_worker(exc):
                        killed.append(futures[future])
                    else:
                        yield on_error(futures[future], f"{type(exc).__name__}: {exc}")
            while killed:
                outcome = self._alone(client, fn, killed[0], on_error)
                killed.pop(0)
                yield outcome
        except _NoWorkersError as exc:
            for future in list(pending):
                future.cancel()
                yield on_error(futures[future], str(exc))
            for task in killed:
                yield on_error(task, str(exc))

    def _alone(self, client, fn, task, on_error) -> Outcome:
        """Run a unit whose workers died again, alone on the cluster.

        dask counts a death against every unit a dying worker held, the one
        it ran and those waiting there, and fails a unit after a few: a unit
        that kills its worker took others with it.  Retried alone, only a
        unit that kills its worker by itself fails (as on the local pool).
        """
        key = f"{task.stage.name}-{task.unit}-{uuid.uuid4().hex[:8]}"
        future = client.submit(fn, task, pure=False, key=key)
        self._futures = [future]
        for done in self._completed(client, {future}):
            try:
                return done.result()
            except Exception as exc:  # KilledWorker, lost connection, ...
                return on_error(task, f"{type(exc).__name__}: {exc}")
        raise AssertionError("unreachable: the future completes or _completed raises")

    def flow(self, fn, tasks, on_error, on_done, key=None) -> None:
        if not tasks:
            return

        client = self._connect()
        batch = uuid.uuid4().hex[:8]
        futures = {}

        def submit(ready: Sequence[Any]) -> list:
            submitted = []
            for task in sorted(ready, key=key) if key is not None else ready:
                reason = _unpicklable(task)
                if reason is not None:
                    submitted += submit(on_done(on_error(task, reason)))
                    continue
                future = client.submit(
                    fn, task, pure=False, key=f"{task.stage.name}-{task.unit}-{batch}"
                )
                futures[future] = task
                submitted.append(future)
            self._futures = list(futures)
            return submitted

        pending = set(submit(tasks))
        killed: list = []  # retried alone once nothing else runs (see _alone)
        try:
            while pending or killed:
                for future in self._completed(client, pending):
                    try:
                        outcome = future.result()
                    except Exception as exc:  # KilledWorker, lost connection, ...
                        if _killed_worker(exc):
                            killed.append(futures[future])
                            continue
                        outcome = on_error(futures[future], f"{type(exc).__name__}: {exc}")
                    pending.update(submit(on_done(outcome)))
                if killed:
                    outcome = self._alone(client, fn, killed[0], on_error)
                    killed.pop(0)
                    pending.update(submit(on_done(outcome)))
        except _NoWorkersError as exc:
            # the units waiting fail, and so do those that would follow them
            failed = [futures[future] for future in pending] + killed
            for future in pending:
                future.cancel()
            while failed:
                for task in on_done(on_error(failed.pop(), str(exc))):
                    failed.append(task)

    def _completed(self, client, pending: set) -> Iterator[Any]:
        """Futures of ``pending`` as they finish (the caller may add to it).

        Raises `_NoWorkersError` if the run's own cluster has had no worker for
        :data:`NO_WORKERS_TIMEOUT` seconds (a scheduler given in the config
        may gain workers later: there the run waits).
        """
        finished: queue.SimpleQueue = queue.SimpleQueue()
        watched: set = set()
        alone_since = None
        while pending:
            for future in pending - watched:
                future.add_done_callback(finished.put)
                watched.add(future)
            try:
                # wake up now and then to see whether the cluster still has workers
                future = finished.get(timeout=min(5.0, NO_WORKERS_TIMEOUT / 4))
            except queue.Empty:
                if self._cluster is None or client.scheduler_info().get("workers"):
                    alone_since = None
                elif alone_since is None:
                    alone_since = time.monotonic()
                elif time.monotonic() - alone_since > NO_WORKERS_TIMEOUT:
                    raise _NoWorkersError(_NO_WORKERS.format(NO_WORKERS_TIMEOUT)) from None
                continue
            alone_since = None
            if future in pending:
                pending.discard(future)
                yield future

    def close(self) -> None:
        if self._client is not None:
            self._client.close()
            self._client = None
        if self._cluster is not None:
            if all(future.done() for future in self._futures):
                end_idle_workers(self._cluster)
            self._cluster.close()
            self._cluster = None
        self._reaper.stop()


def _killed_worker(exc: BaseException) -> bool:
    """Whether dask gave up on a task because workers died while they held it."""
    return type(exc).__name__ == "KilledWorker"


def _fitted(workers: int, units_at_once: int | None) -> int:
    """Workers to start for a run of at most ``units_at_once`` units at once (None: unknown)."""
    if units_at_once is None or units_at_once >= workers:
        return workers
    log.info(
        "%d worker%s instead of %d: the run has no more units to run at once",
        max(units_at_once, 1),
        "s" if units_at_once > 1 else "",
        workers,
    )
    return max(units_at_once, 1)


def end_idle_workers(cluster) -> None:
    """Kill the worker processes of the run's own ``LocalCluster``, which have nothing to do.

    Closing the cluster asks each worker to close and waits up to 4 s
    (distributed's default) before killing it: a worker's interpreter takes
    that long to exit with the libraries it loaded, and an idle worker of
    the run has nothing left to write (its units wrote their products).  Each
    nanny is first told not to start its worker again
    (``Nanny.close_gracefully``), as it would after an unexpected death.
    """
    for nanny in list(cluster.workers.values()):
        pid = getattr(nanny, "pid", None)
        if not pid:
            continue
        nanny.close_gracefully()
        with contextlib.suppress(ProcessLookupError):
            os.kill(pid, signal.SIGKILL)


#: dask settings of the cluster a run starts for itself (its workers get them
#: from their nannies): no HTTP routes, and none of the workers' sampling of
#: their own threads, which takes the GIL from the unit computing (every 10 ms
#: for the statistical profile, every 1 ms for the GIL contention metric when
#: ``gilknocker`` is installed) for diagnostics that no one reads, as the
#: cluster serves no dashboard.
CLUSTER_SETTINGS = {
    "distributed.scheduler.http.routes": [],
    "distributed.worker.http.routes": [],
    "distributed.worker.profile.enabled": False,
    "distributed.admin.system-monitor.gil.enabled": False,
}

#: Environment variables dask's nannies set in their workers that the run's
#: own cluster leaves out: ``MALLOC_TRIM_THRESHOLD_`` (dask sets 65536, to
#: give memory back to the system sooner) fixes glibc's thresholds, so every
#: array above 128 kB is mapped afresh and its pages faulted in and zeroed on
#: each allocation: astrometry's unit took 13.8 s of CPU, 8.5 s of it in the
#: kernel, instead of 5.2 s.  The thread limits (one BLAS/OpenMP thread per
#: single-threaded worker) are kept.  A value in the run's own environment
#: (the user's) still reaches the workers: a nanny's workers inherit it.
UNSET_WORKER_ENVIRON = ("MALLOC_TRIM_THRESHOLD_",)


def worker_environ() -> dict:
    """dask's ``distributed.nanny.pre-spawn-environ`` without :data:`UNSET_WORKER_ENVIRON`."""
    import dask

    environ = dask.config.get("distributed.nanny.pre-spawn-environ", default={}) or {}
    return {key: value for key, value in environ.items() if key not in UNSET_WORKER_ENVIRON}


def start_local_cluster(workers: int):
    """A ``distributed.LocalCluster`` for one run: loopback only, no HTTP routes, TLS if possible.

    Its workers do not profile themselves (see :data:`CLUSTER_SETTINGS`) and
    keep glibc's own memory thresholds (:func:`worker_environ`).
    Returns the cluster; its ``security`` is the per-run TLS setting
    (``Security.temporary()``, which needs the ``cryptography`` package), or
    None without it.
    """
    import dask
    import distributed

    try:
        security = distributed.security.Security.temporary()
    except ImportError:
        security = None
        log.info(
            "dask: no per-run TLS certificate (install 'cryptography' for one); the run's "
            "scheduler listens on 127.0.0.1 without authentication"
        )
    settings = {**CLUSTER_SETTINGS, "distributed.nanny.pre-spawn-environ": worker_environ()}
    with dask.config.set(settings):
        cluster = distributed.LocalCluster(
            n_workers=workers,
            threads_per_worker=1,
            processes=True,
            host="127.0.0.1",
            protocol="tls://" if security is not None else "tcp://",
            security=security,
            dashboard_address="127.0.0.1:0",  # a random loopback port, not 8787
            scheduler_kwargs={"dashboard": False},
        )
    cluster.security = security
    return cluster


def available_memory() -> int | None:
    """Bytes of memory available to new processes (Linux ``MemAvailable``), or None."""
    try:
        with open("/proc/meminfo", encoding="ascii") as stream:
            for line in stream:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (AttributeError, OSError, ValueError):
        return None


def worker_memory(stretch_rows: int, overlap_rows: int, n_columns: int) -> float:
    """Estimated peak memory of one worker, bytes.

    About 0.25 GB for the interpreter and libraries plus 100 bytes per pixel
    of a stretch with its margins: detect, the largest, holds about a dozen
    float32/float64 planes of it at once (measured with bench_night.py's
    1040 x 4224-pixel stretches: 0.66-0.69 GB per worker, proportional set
    size; calibrate and rectify alone needed 45 bytes per pixel).
    """
    return 0.25e9 + 100.0 * (stretch_rows + 2 * overlap_rows) * n_columns


def default_workers(run: RunSection, n_columns: int | None) -> int:
    """Workers when ``run.workers`` is unset: one per core, as many as fit the memory."""
    cores = os.cpu_count() or 1
    memory = available_memory()
    if n_columns is None or memory is None:
        log.info("run.workers not set: %d workers (one per core)", cores)
        return cores
    need = worker_memory(run.rows_per_stretch(n_columns), run.overlap_rows, n_columns)
    fit = int(memory // need)
    workers = max(1, min(cores, fit))
    log.info(
        "run.workers not set: %d worker%s (%d cores, %.1f GB available, ~%.2f GB per worker)",
        workers,
        "s" if workers > 1 else "",
        cores,
        memory / 1e9,
        need / 1e9,
    )
    if fit < 1:
        log.warning(
            "one worker needs ~%.2f GB but only %.1f GB are available: lower run.stretch_rows "
            "or free memory",
            need / 1e9,
            memory / 1e9,
        )
    return workers


def make_executor(run: RunSection, n_columns: int | None = None) -> Executor:
    """The executor the ``run`` section asks for (workers start on first use).

    ``n_columns`` (the camera's) sizes the default number of workers.
    """
    if run.executor == "serial":
        return Executor()
    workers = run.workers or default_workers(run, n_columns)
    if run.executor == "dask":
        return DaskExecutor(run.scheduler, workers)
    return LocalPoolExecutor(workers)
