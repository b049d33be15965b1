"""Verification: requirement versions judged on revisions over plant families.

Flow for one revision (docs/architecture.md):

1. *plan* (:mod:`.plan`, read snapshot): the loop, the plant's latest version and every
   applicable requirement version (latest, not retired, with a metric, applying to the loop)
   that has no result yet for (revision, requirement version, plant version);
2. *compute* (:mod:`.compute`, no session, no lock held): metric values come from the
   content-hash cache when present, otherwise one batched ``measure_family`` call over the
   whole family computes every missing (metric, settings) request at once;
3. *record* (:mod:`.record`, one transaction): cache rows and results together, so a revision
   never has half its results.  Rerunning after a crash computes exactly what is missing.

:mod:`.runner` drives the three, with a process pool for many revisions.
"""

from .compute import (
    Judged,
    clear_family_cache,
    compute_plan,
    compute_plans,
    controller_for,
    family_for,
    judge_payload,
    loop_spec_for,
    validate_controller,
)
from .plan import Check, RevisionPlan, applicable_checks, engine_version, plan_head, plan_revision
from .record import INF_SENTINEL, rejudge_cached, uncap, write_results

__all__ = ["Check", "RevisionPlan", "Judged", "plan_revision", "plan_head", "applicable_checks",
           "compute_plan", "compute_plans", "judge_payload", "write_results", "rejudge_cached",
           "engine_version", "family_for", "clear_family_cache", "loop_spec_for",
           "controller_for", "validate_controller", "INF_SENTINEL", "uncap"]
