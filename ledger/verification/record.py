"""Recording: the results of a computed plan, written in the caller's one transaction."""

from __future__ import annotations

import json
from datetime import datetime, timezone
from typing import Iterable

from ..store.session import Session

from ..store import chain as chain_db
from ..store import plants as plants_db
from ..store import results as results_db
from ..store import revisions as rev_db
from ..store.models import Loop
from ..store.results import INF_SENTINEL, uncap
from .compute import Judged, judge_payload
from .plan import Check, RevisionPlan, applicable_checks, engine_version, plan_head

__all__ = ["write_results", "rejudge_cached", "INF_SENTINEL", "uncap"]


def write_results(s: Session, plan: RevisionPlan, revision_id: int,
                  payloads: dict[str, dict], fresh: set[str], *,
                  rows_only: bool = False) -> list[tuple[Check, Judged]] | list[dict]:
    """Write cache rows for ``fresh`` keys and one result per check, in the caller's
    transaction.  ``rows_only``: write nothing, return the result rows (the caller writes them
    through :func:`ledger.store.chain.append_results`, see :func:`rejudge_cached`)."""
    now = datetime.now(timezone.utc)
    ev = engine_version()
    metric_rows = [
        {"key": k, "metric": payloads[k]["metric"], "values_json": json.dumps(payloads[k]),
         "engine_version": ev, "created_at": now} for k in sorted(fresh)]
    rows, out = [], []
    for c in plan.checks:
        k = plan.metric_key(c.metric, c.settings)
        jd = judge_payload(c, payloads[k])
        out.append((c, jd))
        rows.append({
            "revision_id": revision_id, "requirement_version_id": c.version_id,
            "plant_version_id": plan.plant_version_id, "verdict": jd.verdict,
            "value": results_db.cap(jd.value), "headroom": results_db.cap(jd.headroom),
            "headroom_fraction": results_db.cap(jd.headroom_fraction),
            "worst_variant": jd.worst_variant, "pass_fraction": jd.pass_fraction,
            "variants": jd.variants, "samples": jd.samples,
            "sample_passes": jd.sample_passes, "reason": jd.reason, "metric_key": k,
            "engine_version": ev, "created_at": now,
        })
    if rows_only:
        return rows
    # one chained batch: row hashes, cache rows, skip of subjects another writer recorded
    # first; serialised with sign-offs (a sign-off compares against live results)
    chain_db.append_results(s, revision_id, rows, metric_rows)
    return out


def rejudge_cached(s: Session, loop: Loop, keys: Iterable[str] | None = None) -> int:
    """Judge every revision of ``loop`` that lacks a result for the latest version of the
    requirements ``keys`` (all applicable ones by default) against the latest plant version,
    wherever the metric-value cache already holds the value: no kernel evaluation, all in the
    caller's transaction.  Checks without a cached value are left for ``verify``.

    Returns
    -------
    int
        Revisions that got at least one result.
    """
    pv = plants_db.latest_version(s, loop.plant_id)
    if pv is None:
        return 0
    checks = applicable_checks(s, loop.id, keys)
    if not checks:
        return 0
    done = results_db.judged_pairs(s, pv.id, [c.version_id for c in checks])
    plans = []
    for rev in rev_db.revision_rows(s, loop):
        plan = plan_head(loop, pv, rev)
        todo = [(c, plan.metric_key(c.metric, c.settings)) for c in checks
                if (rev.id, c.version_id) not in done]
        if todo:
            plans.append((plan, todo))
    cached = results_db.load_cached(s, {k for _, todo in plans for _, k in todo})
    n = 0
    for plan, todo in plans:
        plan.checks = [c for c, k in todo if k in cached]
        if plan.checks:
            rows = write_results(s, plan, plan.revision_id,
                                 {k: cached[k] for _, k in todo if k in cached}, set(),
                                 rows_only=True)
            # one chained batch per revision (the cache rows exist already)
            if chain_db.append_results(s, plan.revision_id, rows, []) is not None:
                n += 1
    return n
