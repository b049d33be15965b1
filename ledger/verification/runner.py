"""The verification runner: plan (one read snapshot), compute (no lock held; in this process,
a process pool or a Dask cluster: :mod:`.executors`), record (one write transaction per
revision, always in this process).

Every function takes the open :class:`~ledger.api.Ledger` (``lg``): its unit of work
``lg.store``, its author and the counter ``lg.kernel_requests`` of (metric, settings)
requests the engine evaluated.  See docs/architecture.md.
"""

from __future__ import annotations

from typing import Callable, Iterable

from ..errors import ClusterError, LedgerError, with_context
from ..records import RequirementInfo, RevisionInfo
from ..store import loops as loops_db
from ..store import revisions as rev_db
from .compute import compute_plan, controller_for, family_for, loop_spec_for
from .compute import validate_controller
from .executors import init_worker, open_executor, worker_pool
from .plan import plan_controller, plan_loops, plan_revision
from . import tried
from .record import rejudge_cached, write_results
from .units import Assembly, make_units, run_unit

__all__ = ["verify", "add_revision", "numeric_setup", "after_requirement_change",
           "worker_pool", "init_worker"]


def verify(lg, loop: str | None = None, *, label: str | None = None, tips_only: bool = False,
           keys: Iterable[str] | None = None,
           progress: Callable[[int, int, str], None] | None = None,
           workers: int = 1, cluster=None) -> list[dict]:
    """:meth:`ledger.api.Ledger.verify` (see there)."""
    executor = open_executor(workers, cluster)  # refuses bad options before any work
    with lg.store.reading() as s:
        plans = plan_loops(s, loop, label=label, tips_only=tips_only, keys=keys)
    report: list[dict] = []

    def record(i: int, payloads: dict, n: int) -> None:
        plan, cached = plans[i]
        lg.kernel_requests += n
        fresh = set(payloads) - set(cached)
        # this process alone writes: one transaction per revision, skipping subjects already
        # recorded (a task computed twice writes nothing twice)
        lg.store.write(lambda s: write_results(s, plan, plan.revision_id, payloads, fresh))
        report.append({"loop": plan.loop, "revision": plan.label,
                       "results": len(plan.checks), "computed": n})

    with executor:
        if plans:
            units, todos = make_units(plans, executor.slots, least_work=executor.least_work,
                                      chunk_families=executor.chunk_families)
        else:
            units, todos = [], {}
        asm = Assembly(plans, units, todos)
        total = len(units)
        if progress:
            progress(0, total, "planning done")
        for i in asm.ready_without_work():
            record(i, *asm.payloads(i))
        mine = _engine_version()
        try:
            for done, (u, (version, result)) in enumerate(executor.run(run_unit, units), 1):
                if version != mine:
                    raise ClusterError(f"a worker of the {executor.name} computes with engine "
                                       f"{version}, this process with {mine}: install the "
                                       "same loopledger version on the workers")
                last = ""
                for i in asm.add(units[u], result):
                    record(i, *asm.payloads(i))
                    last = f"{plans[i][0].loop}/{plans[i][0].label}"
                if progress:
                    progress(done, total, last or f"task {done}")
        except ClusterError as e:
            raise ClusterError(f"{e}; {len(report)} of {len(plans)} revision(s) recorded, "
                               "none half-written: run verify again to compute the rest") from e
    order = {(p.loop, p.label): k for k, (p, _) in enumerate(plans)}
    report.sort(key=lambda r: order[(r["loop"], r["revision"])])
    return report


def _engine_version() -> str:
    from ..engine.results import engine_version as current

    return current()


def add_revision(lg, loop: str, controller: str, *, rationale: str, parent: str | None = "tip",
                 author: str | None = None, label: str | None = None,
                 verify: bool = True, discretization: str = "",
                 number_format: str = "", prefilter: str = "",
                 anti_windup: str = "none",
                 anti_windup_gain: float | None = None) -> RevisionInfo:
    """:meth:`ledger.api.Ledger.add_revision` (see there): the metric values are computed
    before the write (values a dry run kept in :mod:`.tried` are reused); the revision and all
    its results are recorded in one transaction."""
    payloads, fresh, plan = {}, set(), None
    if verify:
        with lg.store.reading() as s:
            plan, cached = plan_controller(s, loop, controller, discretization=discretization,
                                           number_format=number_format, prefilter=prefilter,
                                           anti_windup=anti_windup,
                                           anti_windup_gain=anti_windup_gain)
        try:
            validate_controller(plan)
        except LedgerError as e:
            raise with_context(e, f"revision of loop {loop!r}") from e
        # values a dry run (try_revision) computed for this very controller are reused
        kept = tried.recall(k for k in plan.keys() if k not in cached)
        payloads, n = compute_plan(plan, {**cached, **kept})
        fresh = set(payloads) - set(cached)
        lg.kernel_requests += n

    def op(s):
        info, created = rev_db.add(s, loop, controller, rationale=rationale, parent=parent,
                                   author=author or lg.author, label=label,
                                   discretization=discretization or "",
                                   number_format=number_format or "",
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
