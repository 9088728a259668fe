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
  keep the environment of its own start).  The pool is created on first use
  and reused by later stages of the run.
* ``dask``: a :class:`distributed.Client` connected to ``run.scheduler``, or,
  without a scheduler address, to a ``distributed.LocalCluster`` of
  ``run.workers`` processes started for the run.  Workers must see the same
  file system as this process (they read inputs and write products).
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import uuid
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from concurrent.futures.process import BrokenProcessPool
from typing import Any

from pipeline.config import RunSection

__all__ = ["Executor", "make_executor"]

log = logging.getLogger(__name__)

Outcome = Any
OnError = Callable[[Any, str], Outcome]

_SPAWN = multiprocessing.get_context("spawn")
_BROKEN = object()  # marker: the task's pool broke before it reported
_DIED = "its worker process died (killed, or out of memory); see the system log"


class Executor:
    """Runs ``fn`` over tasks; a context manager that frees its workers on exit."""

    #: Whether workers are other processes (their log records must be shipped back).
    remote = False

    def map(self, fn: Callable[[Any], Outcome], tasks: Sequence[Any], on_error: OnError):
        """Yield ``fn(task)`` for every task, in completion order."""
        for task in tasks:
            yield fn(task)

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

    def map(self, fn, tasks, on_error) -> Iterator[Outcome]:
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
        if not tasks:
            return
        if self._pool is None:
            self._pool = ProcessPoolExecutor(max_workers=self.workers, mp_context=_SPAWN)
            log.debug("started a local pool of %d worker processes", self.workers)
        futures = {self._pool.submit(fn, task): task for task in tasks}
        broken = False
        for future in as_completed(futures):
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

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None


class DaskExecutor(Executor):
    """A dask.distributed client on a given scheduler or on a LocalCluster of its own."""

    remote = True

    def __init__(self, scheduler: str | None, workers: int):
        self.scheduler = scheduler
        self.workers = workers
        self._client = None
        self._cluster = None

    def _connect(self):
        import distributed

        if self._client is None:
            if self.scheduler is None:
                self._cluster = distributed.LocalCluster(
                    n_workers=self.workers,
                    threads_per_worker=1,
                    processes=True,
                    dashboard_address=None,
                )
                address = self._cluster.scheduler_address
            else:
                address = self.scheduler
            self._client = distributed.Client(address, set_as_default=False)
            log.info("dask scheduler %s", address)
        return self._client

    def map(self, fn, tasks, on_error) -> Iterator[Outcome]:
        if not tasks:
            return
        import distributed

        client = self._connect()
        batch = uuid.uuid4().hex[:8]
        futures = {
            client.submit(fn, task, pure=False, key=f"{task.stage.name}-{task.unit}-{batch}"): task
            for task in tasks
        }
        for future in distributed.as_completed(list(futures), loop=client.loop):
            try:
                yield future.result()
            except Exception as exc:  # KilledWorker, lost connection, ...
                yield on_error(futures[future], f"{type(exc).__name__}: {exc}")

    def close(self) -> None:
        if self._client is not None:
            self._client.close()
            self._client = None
        if self._cluster is not None:
            self._cluster.close()
            self._cluster = None


def make_executor(run: RunSection) -> Executor:
    """The executor the ``run`` section asks for (workers start on first use)."""
    workers = run.workers or os.cpu_count() or 1
    if run.executor == "serial":
        return Executor()
    if run.executor == "dask":
        return DaskExecutor(run.scheduler, workers)
    return LocalPoolExecutor(workers)
