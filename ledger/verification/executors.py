"""The executor seam: where a verification run's tasks (:mod:`.units`) are computed.

One interface, three implementations:

* :class:`InProcess` (the default): every task in this process, one after the other;
* :class:`ProcessPool`: worker processes on this machine (``verify --workers N``);
* :class:`~ledger.verification.cluster.DaskCluster`: the workers of a Dask scheduler
  (``verify --cluster ADDRESS`` or ``local:N``), in :mod:`.cluster`, imported only when asked.

An executor only computes: it takes picklable tasks and gives back their results as they
complete.  Writing to the ledger stays with the caller (:mod:`.runner`), one transaction per
revision, whatever the executor.
"""

from __future__ import annotations

import os
from typing import Callable, Iterator

from ..errors import UsageError

__all__ = ["Executor", "InProcess", "ProcessPool", "open_executor"]


class Executor:
    """Where tasks run.

    Attributes
    ----------
    name : str
        Shown in messages (``"in-process"``, ``"process pool of 2"``, ``"Dask cluster at ..."``).
    least_work : int
        Least variant x request evaluations worth one task here (the per-task cost of this
        executor; :func:`.units.make_units`).
    chunk_families : bool
        Whether one revision's family may be split into group chunks over several tasks.
    """

    name = "in-process"
    least_work = 1
    chunk_families = False

    @property
    def slots(self) -> int:
        """Tasks computed at the same time."""
        return 1

    def run(self, fn: Callable, tasks: list) -> Iterator[tuple[int, object]]:
        """``(position, fn(task))`` for every task, in the order they complete."""
        for i, t in enumerate(tasks):
            yield i, fn(t)

    def close(self) -> None:
        """Release workers and connections (idempotent)."""

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class InProcess(Executor):
    """Every task in the calling process (the default)."""


class ProcessPool(Executor):
    """Worker processes on this machine (:func:`ledger.verification.runner.worker_pool`): made
    when the first tasks are run, so forked workers inherit the plant families and group plans
    the caller has built while cutting the tasks."""

    chunk_families = True

    def __init__(self, workers: int):
        self.workers = max(1, int(workers))
        self.name = f"process pool of {self.workers}"

    @property
    def slots(self) -> int:
        return self.workers

    def run(self, fn, tasks):
        from concurrent.futures import as_completed

        from .runner import worker_pool

        if not tasks:
            return
        with worker_pool(min(self.workers, len(tasks))) as pool:
            futures = {pool.submit(fn, t): i for i, t in enumerate(tasks)}
            try:
                for fut in as_completed(futures):
                    yield futures[fut], fut.result()
            finally:
                for fut in futures:
                    fut.cancel()


def open_executor(workers: int = 1, cluster=None) -> Executor:
    """The executor for ``workers`` (``0`` = one process per core) or ``cluster``.

    Parameters
    ----------
    workers : int
        Processes on this machine; 1 computes in this process.
    cluster : str or distributed.Client, optional
        A Dask scheduler address (``tcp://host:8786``, ``tls://...``), ``local:N`` (a local
        cluster of N worker processes, ``local`` = one per core), or a connected
        ``distributed.Client`` (left open).  Needs the ``cluster`` extra.

    Raises
    ------
    UsageError
        Both ``workers`` > 1 and a cluster, a malformed ``local:N``, or the ``cluster`` extra
        is not installed.
    """
    if cluster is not None and not (isinstance(cluster, str) and not cluster.strip()):
        if int(workers) not in (0, 1):
            raise UsageError("give --workers or --cluster, not both: a cluster's workers "
                             "are its own processes")
        from .cluster import DaskCluster

        return DaskCluster(cluster)
    workers = (os.cpu_count() or 1) if int(workers) == 0 else max(1, int(workers))
    return InProcess() if workers == 1 else ProcessPool(workers)
