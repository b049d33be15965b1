"""The verification runner: plan (one read snapshot), compute (no lock held; in a process
pool when asked), record (one write transaction per revision).

Every function takes the open :class:`~ledger.api.Ledger` (``lg``): its unit of work
``lg.store``, its author and the counter ``lg.kernel_requests`` of (metric, settings)
requests the engine evaluated.  See docs/architecture.md.
"""

from __future__ import annotations

import os
from typing import Callable, Iterable

from ..errors import LedgerError, with_context
from ..records import RequirementInfo, RevisionInfo
from ..store import loops as loops_db
from ..store import revisions as rev_db
from .compute import compute_plan, compute_plans, controller_for, family_for, loop_spec_for
from .compute import validate_controller
from .plan import plan_controller, plan_loops, plan_revision
from .record import rejudge_cached, write_results

__all__ = ["verify", "add_revision", "numeric_setup", "after_requirement_change",
           "worker_pool", "init_worker"]


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


def verify(lg, loop: str | None = None, *, label: str | None = None, tips_only: bool = False,
           keys: Iterable[str] | None = None,
           progress: Callable[[int, int, str], None] | None = None,
           workers: int = 1) -> list[dict]:
    """:meth:`ledger.api.Ledger.verify` (see there)."""
    with lg.store.reading() as s:
        plans = plan_loops(s, loop, label=label, tips_only=tips_only, keys=keys)
    report: list[dict] = []
    total = len(plans)

    def record(i: int, plan, cached, payloads, n):
        lg.kernel_requests += n
        fresh = set(payloads) - set(cached)
        lg.store.write(lambda s: write_results(s, plan, plan.revision_id, payloads, fresh))
        report.append({"loop": plan.loop, "revision": plan.label,
                       "results": len(plan.checks), "computed": n})
        if progress:
            progress(i + 1, total, f"{plan.loop}/{plan.label}")

    if progress:
        progress(0, total, "planning done")
    workers = (os.cpu_count() or 1) if workers == 0 else max(1, int(workers))
    if workers == 1 or total < 2:
        for i, (plan, cached) in enumerate(plans):
            payloads, n = compute_plan(plan, cached, workers=workers if total == 1 else 1)
            record(i, plan, cached, payloads, n)
        return report

    from concurrent.futures import as_completed

    for plan, _ in plans[:1]:
        family_for(plan)  # and the family cache, for the common one-plant case
    n_workers = min(workers, total)
    # a few plans per task: fewer round trips than one task per revision, while every
    # worker still gets several tasks to balance uneven revisions
    chunk = max(1, total // (4 * n_workers))
    batches = [plans[k:k + chunk] for k in range(0, total, chunk)]
    with worker_pool(n_workers) as pool:
        futures = {pool.submit(compute_plans, batch): batch for batch in batches}
        done = 0
        for fut in as_completed(futures):
            for (plan, cached), (payloads, n) in zip(futures[fut], fut.result()):
                record(done, plan, cached, payloads, n)
                done += 1
    order = {(p.loop, p.label): k for k, (p, _) in enumerate(plans)}
    report.sort(key=lambda r: order[(r["loop"], r["revision"])])
    return report


def add_revision(lg, loop: str, controller: str, *, rationale: str, parent: str | None = "tip",
                 author: str | None = None, label: str | None = None,
                 verify: bool = True, prefilter: str = "", anti_windup: str = "none",
                 anti_windup_gain: float | None = None) -> RevisionInfo:
    """:meth:`ledger.api.Ledger.add_revision` (see there): the metric values are computed
    before the write; the revision and all its results are recorded in one transaction."""
    payloads, fresh, plan = {}, set(), None
    if verify:
        with lg.store.reading() as s:
            plan, cached = plan_controller(s, loop, controller, prefilter=prefilter,
                                           anti_windup=anti_windup,
                                           anti_windup_gain=anti_windup_gain)
        try:
            validate_controller(plan)
        except LedgerError as e:
            raise with_context(e, f"revision of loop {loop!r}") from e
        payloads, n = compute_plan(plan, cached)
        fresh = set(payloads) - set(cached)
        lg.kernel_requests += n

    def op(s):
        info, created = rev_db.add(s, loop, controller, rationale=rationale, parent=parent,
                                   author=author or lg.author, label=label,
                                   prefilter=prefilter, anti_windup=anti_windup,
                                   anti_windup_gain=anti_windup_gain)
        if created and plan is not None and plan.checks:
            row = rev_db.revision_row(s, loops_db.loop_row(s, loop), info.label)
            write_results(s, plan, row.id, payloads, fresh)
        return info

    return lg.store.write(op)


def numeric_setup(lg, loop: str, label: str | None = None):
    """:meth:`ledger.api.Ledger.numeric_setup` (see there)."""
    with lg.store.reading() as s:
        lp = loops_db.loop_row(s, loop)
        rev = rev_db.revision_or_tip(s, lp, label)
        plan = plan_revision(s, lp, revision=rev, missing_only=False)
    return family_for(plan), controller_for(plan), loop_spec_for(plan)


def after_requirement_change(lg, info: RequirementInfo) -> None:
    """Judge a new requirement version: on the tip of each loop it applies to (computing
    what is missing), then on every other revision whose metric values are cached (a limit
    edit costs no kernel evaluation there), so older revisions do not turn stale."""
    if lg.auto_verify and info.metric and info.status != "retired" and info.loops:
        for lname in info.loops:
            verify(lg, lname, tips_only=True, keys=[info.key])
            lg.store.write(lambda s, n=lname: rejudge_cached(s, loops_db.loop_row(s, n),
                                                             [info.key]))
