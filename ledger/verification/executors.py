"""The executor seam (the interface in :mod:`.seam`): where a verification run's tasks
(:mod:`.units`) are computed.

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

from ..errors import UsageError
from .seam import Executor

__all__ = ["Executor", "InProcess", "ProcessPool", "open_executor", "worker_pool",
           "init_worker"]


def init_worker() -> None:
    """Run once in every worker process of :func:`worker_pool` before its first task: the
    worker ends when its parent dies (ledger/workers.py)."""
    from ..workers import die_with_parent, one_blas_thread

    die_with_parent()
    one_blas_thread()


def worker_pool(n_workers: int):
    """The process pool verification computes in (the one place worker processes are made).

    Forked workers inherit the engine already imported and the plant families already built
    by the parent; where fork is not available, workers are spawned.
    """
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    from ..engine import kernels as _engine_loaded  # noqa: F401 - forked workers inherit it

    ctx = mp.get_context("fork" if "fork" in mp.get_all_start_methods() else "spawn")
    return ProcessPoolExecutor(max_workers=n_workers, mp_context=ctx, initializer=init_worker)


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
