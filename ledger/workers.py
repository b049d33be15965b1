"""Worker processes that die with their parent.

A command that computes in worker processes (``verify --workers N``) must not leave them
running when it is killed: a killed parent cannot tell its pool to shut down, so each worker
arranges its own end.  :func:`die_with_parent` is the pool initializer that does it:

* on Linux the kernel sends the worker ``SIGTERM`` the moment its parent thread exits
  (``prctl(PR_SET_PDEATHSIG)``, see prctl(2));
* everywhere (and as a second line on Linux) a daemon thread polls ``os.getppid()`` and ends
  the worker once the parent it started under is gone (the worker is re-parented, so the id
  changes).
"""

from __future__ import annotations

import os
import signal
import sys
import threading

__all__ = ["die_with_parent", "one_blas_thread", "POLL_SECONDS"]

#: how often the fallback watcher looks at the parent process id, in seconds
POLL_SECONDS = 0.5

_PR_SET_PDEATHSIG = 1  # <linux/prctl.h>


def _linux_death_signal() -> bool:
    """Ask the kernel to send SIGTERM when the parent dies; True when that was accepted."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(_PR_SET_PDEATHSIG, int(signal.SIGTERM), 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


def _watch(parent: int, poll: float) -> None:
    ev = threading.Event()
    while not ev.wait(poll):
        if os.getppid() != parent:
            os._exit(1)  # the parent is gone: nothing to report to, nobody to flush for


def die_with_parent(parent: int | None = None, poll: float = POLL_SECONDS) -> None:
    """Make the calling (worker) process end when its parent process ends.

    Parameters
    ----------
    parent : int, optional
        Process id of the parent; default ``os.getppid()`` at the time of the call.
    poll : float
        Seconds between two looks of the fallback watcher thread.
    """
    parent = os.getppid() if parent is None else int(parent)
    _linux_death_signal()
    if os.getppid() != parent:  # the parent died before the signal was armed
        os._exit(1)
    threading.Thread(target=_watch, args=(parent, poll), name="die-with-parent",
                     daemon=True).start()


def one_blas_thread() -> None:
    """Limit this worker's BLAS to one thread (threadpoolctl, when installed): the workers
    already fill the cores, and a forked worker whose parent had started a BLAS thread pool
    otherwise competes with its siblings' threads."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return
    _LIMITS.append(threadpool_limits(limits=1, user_api="blas"))


_LIMITS: list = []  # kept alive for the worker's lifetime
