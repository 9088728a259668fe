"""The dask worker plugin of the cluster a run starts for itself (imports distributed)."""

from __future__ import annotations

from distributed import WorkerPlugin

from pipeline.runner._executors import end_with_parent

__all__ = ["EndWithRun"]


class EndWithRun(WorkerPlugin):
    """The worker process ends when the run that started it dies.

    Parameters
    ----------
    run_pid : int
        Process id of the run; with ``LocalCluster(processes=True)`` the
        nannies live in the run's process, so it is each worker's parent.
    """

    name = "zdrift-end-with-run"

    def __init__(self, run_pid: int):
        self.run_pid = run_pid

    def setup(self, worker) -> None:
        # Started from one of dask's threads, not the run's: no death signal,
        # which would fire when that thread ends.
        end_with_parent(self.run_pid, death_signal=False)
