"""Work units: how a verification run's computing is cut into tasks for an executor.

A run's plans (one per revision, :mod:`.plan`) become tasks of one of two shapes:

* **revisions**: one or more whole revisions per task, each computed by one batched
  ``measure_family`` call, as in-process.  Used when there are enough revisions to keep every
  worker busy (at least two per worker slot).
* **group chunks**: a few consecutive groups of one revision's family (the engine's own group
  plan, ``ledger.engine.loop.plan``, the same cut its streaming and ``workers=`` use).  Used
  for a few large revisions, so one family spreads over the workers.  A variant's numbers
  depend only on its group, so the per-group outputs put together in plan order
  (``collect_groups``) are the very object one ``measure_family`` call returns.

Either way a task carries at least ``least_work`` variant x request evaluations when that much
exists (``config.CLUSTER_TASK_WORK`` for a cluster), so the per-task cost of the executor
(scheduling, transfer) stays a small share of the task, but never so much that there are fewer
than two tasks per worker slot (an idle worker costs more than a task's overhead); with
plenty of work there are about four tasks per slot to balance uneven ones (tasks of groups
shrink towards the end, see ``task_groups``, so the slots finish together).

:func:`run_unit` is what a worker runs: plain data in (the plans are texts and numbers), plain
data out, no database.  :class:`Assembly` puts the parts of a revision back together in the
submitting process, which alone writes to the ledger.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ..errors import LedgerError
from .compute import (compute_requests, engine_plan_for, error_payload, family_for,
                      missing_requests, result_payload)
from .plan import RevisionPlan

__all__ = ["Part", "Unit", "make_units", "run_unit", "Assembly"]


@dataclass(frozen=True)
class Part:
    """What one task computes for one revision."""

    index: int                     # position of the revision's plan in the run
    plan: RevisionPlan
    requests: tuple                # ((metric, settings), ...) not in the cache
    groups: tuple | None = None    # group positions of the family's plan; None = all of it


@dataclass(frozen=True)
class Unit:
    """One task: one or more parts and the variant x request evaluations they carry."""

    parts: tuple
    work: int


def _engine_version() -> str:
    from ..engine.results import engine_version as current

    return current()


_BLAS_LIMITED: list = []


def run_unit(unit: Unit) -> tuple[str, list]:
    """Compute one task (in whatever process the executor chose).

    Returns
    -------
    (str, list)
        This process's engine version (the submitter refuses values from another engine) and
        per part either ``("payloads", [payload, ...])`` (whole family, in request order),
        ``("groups", [group output, ...])`` or ``("error", reason)`` (the family's loop was
        refused while measuring its groups).
    """
    if not _BLAS_LIMITED:  # workers fill the cores; one BLAS thread each (ledger/workers.py)
        from ..workers import one_blas_thread

        one_blas_thread()
        _BLAS_LIMITED.append(True)
    out = []
    for part in unit.parts:
        if part.groups is None:
            out.append(("payloads", compute_requests(part.plan, list(part.requests))))
            continue
        from ..engine.measure import measure_groups, resolve_requests

        try:
            outs = measure_groups(engine_plan_for(part.plan), resolve_requests(part.requests),
                                  part.groups)
        except LedgerError as e:
            out.append(("error", str(e)))
        else:
            out.append(("groups", outs))
    return _engine_version(), out


def make_units(plans: list[tuple[RevisionPlan, dict]], workers: int, *,
               least_work: int = 1, chunk_families: bool = True) -> tuple[list[Unit], dict]:
    """Cut a run's (plan, cached payloads) into tasks for ``workers`` worker slots.

    Returns
    -------
    (list of Unit, dict)
        The tasks, and per plan index its ``todo`` ({metric key: (metric, settings)}) for
        :class:`Assembly`.  Plans with nothing to compute get no part.
    """
    todos = {i: missing_requests(plan, cached) for i, (plan, cached) in enumerate(plans)}
    busy = [i for i, t in todos.items() if t]
    workers = max(1, int(workers))
    units: list[Unit] = []
    if not busy:
        return units, todos

    def work_of(i) -> int:
        return len(family_for(plans[i][0])) * len(todos[i])

    if not chunk_families or len(busy) >= 2 * workers:
        avg = sum(work_of(i) for i in busy) / len(busy)
        # one revision per task in this process; in parallel, about four tasks per slot
        balance = len(busy) // (4 * workers) if workers > 1 else 1
        # enough work per task for its cost, but never fewer than two tasks per slot
        enough = min(math.ceil(least_work / max(avg, 1.0)),
                     math.ceil(len(busy) / (2 * workers)))
        per = max(1, enough, balance)
        for k in range(0, len(busy), per):
            idx = busy[k:k + per]
            units.append(Unit(tuple(Part(i, plans[i][0], tuple(todos[i].values())) for i in idx),
                              sum(work_of(i) for i in idx)))
        return units, todos
    from ..engine.measure import task_groups

    for i in busy:
        plan = plans[i][0]
        try:
            groups = engine_plan_for(plan).groups
        except LedgerError:
            groups = ()  # the whole-family part records the engine's reason
        reqs = tuple(todos[i].values())
        if len(groups) < 2:
            units.append(Unit((Part(i, plan, reqs),), work_of(i)))
            continue
        size = sum(g.index.size for g in groups) / len(groups)
        least = min(math.ceil(least_work / max(size * len(reqs), 1.0)),
                    math.ceil(len(groups) / (2 * workers)))
        for pos in task_groups(len(groups), workers, least=least):
            units.append(Unit((Part(i, plan, reqs, tuple(pos)),),
                              int(sum(groups[k].index.size for k in pos)) * len(reqs)))
    return units, todos


class Assembly:
    """The submitting process's side: parts of each revision as they arrive, and the payloads
    of a revision once all of its parts are in."""

    def __init__(self, plans: list[tuple[RevisionPlan, dict]], units: list[Unit], todos: dict):
        self.plans, self.todos = plans, todos
        self.expected: dict[int, int] = {}
        for u in units:
            for p in u.parts:
                self.expected[p.index] = self.expected.get(p.index, 0) + 1
        self.got: dict[int, list] = {}

    def ready_without_work(self) -> list[int]:
        """Plans whose every value is cached (nothing to compute: judge and record now)."""
        return [i for i in range(len(self.plans)) if i not in self.expected]

    def add(self, unit: Unit, result: list) -> list[int]:
        """Take one task's per-part results; returns the plan indices now complete."""
        done = []
        for part, res in zip(unit.parts, result):
            self.got.setdefault(part.index, []).append((part, res))
            if len(self.got[part.index]) == self.expected[part.index]:
                done.append(part.index)
        return done

    def payloads(self, i: int) -> tuple[dict[str, dict], int]:
        """(payloads by metric key, requests computed) of complete plan ``i``."""
        plan, cached = self.plans[i]
        payloads = {k: cached[k] for k in plan.keys() if k in cached}
        todo = self.todos[i]
        if not todo:
            return payloads, 0
        parts = self.got.pop(i)
        keys = list(todo)
        if len(parts) == 1 and parts[0][0].groups is None:
            payloads.update(zip(keys, parts[0][1][1]))
            return payloads, len(todo)
        parts.sort(key=lambda pr: pr[0].groups[0])
        errors = [res[1] for _, res in parts if res[0] == "error"]
        fam = family_for(plan)
        if errors:  # the first refusal in plan order, as one measure_family call would raise
            payloads.update({k: error_payload(todo[k][0], fam.names, errors[0]) for k in keys})
            return payloads, len(todo)
        from ..engine.measure import collect_groups, resolve_requests

        outs = [g for _, res in parts for g in res[1]]
        res = collect_groups(engine_plan_for(plan), resolve_requests(todo.values()), outs)
        payloads.update({k: result_payload(res.get(*todo[k])) for k in keys})
        return payloads, len(todo)
