"""The Dask executor: verification tasks computed by the workers of a Dask scheduler.

Needs the optional ``cluster`` extra (``pip install 'loopledger[cluster]'``, which brings
``dask[distributed]``).  The workers need loopledger itself (same version: the submitting
process refuses values computed by another engine version) and nothing else: no database
access, since every task is plain data in and out and the submitting process alone writes.

A task whose worker dies is computed again on another worker by the scheduler (at most
``distributed.scheduler.allowed-failures`` times, Dask's setting); past that the run stops
with a :class:`~ledger.errors.ClusterError`, leaving what a killed ``verify`` leaves: the
revisions recorded so far, each complete, and none half-written.
"""

from __future__ import annotations

import logging
import os
import uuid

from ..config import CLUSTER_CONNECT_TIMEOUT, CLUSTER_MALLOC_TRIM, CLUSTER_TASK_WORK
from ..errors import ClusterError, UsageError
from .seam import Executor

__all__ = ["DaskCluster", "parse_local", "import_distributed", "EXTRA_HINT"]

#: the one-line hint of a missing optional dependency
EXTRA_HINT = ("--cluster needs the optional 'cluster' extra (dask[distributed]): "
              "pip install 'loopledger[cluster]'")


def import_distributed():
    """The ``distributed`` module, or a :class:`~ledger.errors.UsageError` naming the extra."""
    try:
        import distributed
    except ImportError as e:
        raise UsageError(EXTRA_HINT) from e
    return distributed


def parse_local(spec: str) -> int | None:
    """Worker processes of a ``local:N`` spec (``local`` alone: one per core), ``None`` for a
    scheduler address.

    Raises
    ------
    UsageError
        ``local:`` followed by anything but a whole number >= 1.
    """
    s = spec.strip()
    if s != "local" and not s.startswith("local:"):
        return None
    if s == "local":
        return os.cpu_count() or 1
    n = s[len("local:"):]
    if not n.isdigit() or int(n) < 1:
        raise UsageError(f"cluster {spec!r}: give local:N with N a whole number of worker "
                         "processes, at least 1")
    return int(n)


class DaskCluster(Executor):
    """Tasks on a Dask cluster: a scheduler address, ``local:N``, or a connected
    ``distributed.Client`` (left open when given).  Connects when first needed."""

    chunk_families = True
    least_work = CLUSTER_TASK_WORK

    def __init__(self, cluster, *, timeout: float = CLUSTER_CONNECT_TIMEOUT):
        self._d = import_distributed()
        self.timeout = float(timeout)
        self._cluster = None
        self._own = isinstance(cluster, str)
        if self._own:
            self.spec = cluster.strip()
            self._local = parse_local(self.spec)
            self.client = None
            self.name = (f"local Dask cluster of {self._local}" if self._local
                         else f"Dask cluster at {self.spec}")
        else:
            self.spec, self._local, self.client = "", None, cluster
            info = getattr(cluster, "scheduler", None)
            self.name = f"Dask cluster at {getattr(info, 'address', 'its client')}"

    def _connect(self):
        if self.client is not None:
            return self.client
        d = self._d
        try:
            if self._local:
                import dask

                # processes on loopback only, no dashboard: nothing is exposed beyond this
                # host; no statistical profiler and no eager memory trimming in the workers
                # (both slow the engine's numpy work down; config.CLUSTER_MALLOC_TRIM)
                with dask.config.set({
                        "distributed.worker.profile.enabled": False,
                        "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_":
                            CLUSTER_MALLOC_TRIM}):
                    self._cluster = d.LocalCluster(n_workers=self._local, threads_per_worker=1,
                                                   processes=True, host="127.0.0.1",
                                                   dashboard_address=None,
                                                   silence_logs=logging.ERROR)
                self.client = d.Client(self._cluster, set_as_default=False)
            else:
                self.client = d.Client(self.spec, timeout=self.timeout, set_as_default=False)
            self.client.wait_for_workers(1, timeout=self.timeout)
        except (OSError, TimeoutError) as e:
            self.close()
            raise ClusterError(f"cannot use the {self.name}: {e}".rstrip(": ")) from e
        return self.client

    @property
    def slots(self) -> int:
        return max(1, sum(self._connect().nthreads().values()))

    def run(self, fn, tasks):
        if not tasks:
            return
        client = self._connect()
        run_id = uuid.uuid4().hex[:12]
        futures = [client.submit(fn, t, pure=False, key=f"loopledger-verify-{run_id}-{i}")
                   for i, t in enumerate(tasks)]
        where = {f.key: i for i, f in enumerate(futures)}
        try:
            for fut in self._d.as_completed(futures, loop=client.loop):
                try:
                    res = fut.result()
                except self._d.KilledWorker as e:
                    raise ClusterError(f"a worker of the {self.name} died computing task "
                                       f"{where[fut.key] + 1} of {len(tasks)} (as often as "
                                       "the scheduler allows retries)") from e
                except (OSError, TimeoutError) as e:
                    raise ClusterError(f"lost the {self.name}: {e}") from e
                yield where[fut.key], res
        finally:
            left = [f for f in futures if not f.done()]
            if left:
                try:
                    client.cancel(left)
                except (OSError, TimeoutError, RuntimeError):
                    pass  # the scheduler is gone: nothing left to cancel
            del futures

    def close(self) -> None:
        if not self._own:
            return
        for thing in (self.client, self._cluster):
            if thing is not None:
                try:
                    thing.close()
                except (OSError, TimeoutError, RuntimeError):
                    pass  # already gone
        self.client = self._cluster = None
