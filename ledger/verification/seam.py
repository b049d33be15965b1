"""The executor interface (:mod:`.executors` has the implementations): where a verification
run's tasks are computed.  An executor only computes; the caller writes."""

from __future__ import annotations

from typing import Callable, Iterator

__all__ = ["Executor"]


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
