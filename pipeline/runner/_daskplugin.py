"""The dask worker plugin of the cluster a run starts for itself (imports distributed)."""

from __future__ import annotations

from collections.abc import Sequence

from distributed import WorkerPlugin

from pipeline.runner._executors import WarmPlan, end_with_parent, prepare_worker

__all__ = ["EndWithRun"]


class EndWithRun(WorkerPlugin):
    """The worker process ends when the run that started it dies, and warms up.

    Parameters
    ----------
    run_pid : int
        Process id of the run; with ``LocalCluster(processes=True)`` the
        nannies live in the run's process, so it is each worker's parent.
    modules, plan
        What the worker imports, and what it loads in the background, as
        the local pool's workers do (see
        :func:`pipeline.runner._executors.prepare_worker`).
    """

    name = "zdrift-end-with-run"

    def __init__(self, run_pid: int, modules: Sequence[str] = (), plan: WarmPlan = ()):
        self.run_pid = run_pid
        self.modules, self.plan = tuple(modules), tuple(plan)

    def setup(self, worker) -> None:
        # Started from one of dask's threads, not the run's: no death signal,
        # which would fire when that thread ends.
        end_with_parent(self.run_pid, death_signal=False)
        prepare_worker(self.modules, self.plan)
