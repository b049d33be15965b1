"""Verification in the ledger: requirement versions judged on revisions over plant families.

Flow for one revision (see DESIGN.md):

1. *plan* (read snapshot): the loop, the plant's latest version and every applicable
   requirement version (latest, not retired, with a metric, applying to the loop) that has no
   result yet for (revision, requirement version, plant version);
2. *compute* (no lock held): metric values come from the content-hash cache when present,
   otherwise one batched ``measure_family`` call over the whole family computes every missing
   (metric, settings) request at once;
3. *write* (one transaction): cache rows and results together, so a revision never has half
   its results.  Rerunning after a crash computes exactly what is missing.

A result names the requirement version and plant version it judged; when either is no longer
the latest the result reads as ``stale`` (derived at read time, never written).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Callable, Iterable

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from .errors import ComputeError, LedgerError, ModelError
from .hashing import sha256_of
from .judge import headroom_array, passes_array
from .judge import judge
from .store.models import (
    Loop,
    MetricValue,
    Plant,
    PlantVersion,
    Requirement,
    RequirementLoop,
    RequirementVersion,
    Result,
    Revision,
)
from .units import Limit

__all__ = ["Check", "RevisionPlan", "Judged", "plan_revision", "compute_plan", "judge_payload",
           "write_results", "engine_version"]


def engine_version() -> str:
    from .engine.measure import ENGINE_VERSION

    return ENGINE_VERSION


@dataclass(frozen=True)
class Check:
    """One requirement version to judge."""

    version_id: int
    key: str
    version: int
    status: str
    metric: str
    settings: dict          # complete (defaults filled in)
    comparator: str
    limit_value: float
    limit_text: str
    unit: str


@dataclass
class RevisionPlan:
    loop: str
    loop_id: int
    label: str | None
    revision_id: int | None
    controller_text: str
    controller_canonical: str
    loop_form: dict
    plant_version_id: int
    plant_version: int
    plant_hash: str
    plant_spec: dict
    checks: list[Check] = field(default_factory=list)

    def metric_key(self, metric: str, settings: dict) -> str:
        """Content hash of everything a family's metric values depend on."""
        return sha256_of({
            "engine": engine_version(), "plant": self.plant_hash,
            "controller": self.controller_canonical, "loop": self.loop_form,
            "metric": metric, "settings": _jsonable_settings(settings),
        })


def _jsonable_settings(settings: dict) -> dict:
    return {k: list(v) if isinstance(v, tuple) else v for k, v in sorted(settings.items())}


def loop_form(row: Loop) -> dict:
    return {
        "sensor": row.sensor_text, "prefilter": row.prefilter_text,
        "input_delay": row.input_delay, "output_delay": row.output_delay,
        "sample_time": row.sample_time, "computation_delay": row.computation_delay,
        "actuator_limit": row.actuator_limit,
    }


def latest_plant_version(s: Session, plant_id: int) -> PlantVersion:
    return s.scalar(select(PlantVersion).where(PlantVersion.plant_id == plant_id)
                    .order_by(PlantVersion.number.desc()).limit(1))


def applicable_checks(s: Session, loop_id: int, keys: Iterable[str] | None = None) -> list[Check]:
    """Latest, non-retired, metric-bearing requirement versions that apply to the loop."""
    from .catalogue import metric_unit
    from .engine.metrics import resolve_settings

    from sqlalchemy import func

    latest = (select(RequirementVersion.requirement_id,
                     func.max(RequirementVersion.number).label("n"))
              .group_by(RequirementVersion.requirement_id).subquery())
    query = (select(Requirement.key, RequirementVersion)
             .join(RequirementVersion, RequirementVersion.requirement_id == Requirement.id)
             .join(latest, (latest.c.requirement_id == RequirementVersion.requirement_id)
                   & (latest.c.n == RequirementVersion.number))
             .join(RequirementLoop, (RequirementLoop.version_id == RequirementVersion.id)
                   & (RequirementLoop.loop_id == loop_id))
             .where(RequirementVersion.status != "retired",
                    RequirementVersion.metric.is_not(None))
             .order_by(Requirement.key))
    if keys is not None:
        query = query.where(Requirement.key.in_(list(keys)))
    out = []
    for key, v in s.execute(query):
        out.append(Check(
            version_id=v.id, key=key, version=v.number, status=v.status, metric=v.metric,
            settings=resolve_settings(v.metric, json.loads(v.settings_json)),
            comparator=v.comparator, limit_value=v.limit_value, limit_text=v.limit_text,
            unit=metric_unit(v.metric),
        ))
    return out


def plan_revision(s: Session, loop: Loop, *, revision: Revision | None = None,
                  controller_text: str | None = None, controller_canonical: str | None = None,
                  keys: Iterable[str] | None = None, missing_only: bool = True) -> RevisionPlan:
    """What must be computed to bring ``revision`` (or a not-yet-recorded controller) up to
    date against the latest requirement and plant versions."""
    pv = latest_plant_version(s, loop.plant_id)
    plan = _plan_head(loop, pv, revision, controller_text, controller_canonical)
    checks = applicable_checks(s, loop.id, keys)
    if revision is not None and missing_only:
        done = set(s.scalars(select(Result.requirement_version_id).where(
            Result.revision_id == revision.id, Result.plant_version_id == pv.id)))
        checks = [c for c in checks if c.version_id not in done]
    plan.checks = checks
    return plan


def _plan_head(loop: Loop, pv: PlantVersion, revision: Revision | None,
               controller_text: str | None = None,
               controller_canonical: str | None = None) -> RevisionPlan:
    """A plan without checks for ``revision`` (or a controller) against plant version ``pv``."""
    return RevisionPlan(
        loop=loop.name, loop_id=loop.id, label=revision.label if revision else None,
        revision_id=revision.id if revision else None,
        controller_text=revision.controller_text if revision else controller_text,
        controller_canonical=revision.controller_canonical if revision else controller_canonical,
        loop_form=loop_form(loop), plant_version_id=pv.id, plant_version=pv.number,
        plant_hash=pv.content_hash,
        plant_spec={"model": pv.model_text, "params": json.loads(pv.parameters_json),
                    "fidelity": json.loads(pv.fidelity_json), "samples": pv.samples,
                    "seed": pv.seed, "sample_time": pv.sample_time},
    )


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
    pv = latest_plant_version(s, loop.plant_id)
    if pv is None:
        return 0
    checks = applicable_checks(s, loop.id, keys)
    if not checks:
        return 0
    revs = list(s.scalars(select(Revision).where(Revision.loop_id == loop.id)
                          .order_by(Revision.seq)))
    done = set(s.execute(select(Result.revision_id, Result.requirement_version_id).where(
        Result.plant_version_id == pv.id,
        Result.requirement_version_id.in_([c.version_id for c in checks]))).all())
    plans = []
    for rev in revs:
        plan = _plan_head(loop, pv, rev)
        todo = [(c, plan.metric_key(c.metric, c.settings)) for c in checks
                if (rev.id, c.version_id) not in done]
        if todo:
            plans.append((plan, todo))
    cached = load_cached(s, {k for _, todo in plans for _, k in todo})
    from .chain import append_results

    n = 0
    for plan, todo in plans:
        plan.checks = [c for c, k in todo if k in cached]
        if plan.checks:
            rows = write_results(s, plan, plan.revision_id,
                                 {k: cached[k] for _, k in todo if k in cached}, set(),
                                 rows_only=True)
            # one chained batch per revision (the cache rows exist already)
            if append_results(s, plan.revision_id, rows, []) is not None:
                n += 1
    return n


# -- numerics (no database) ------------------------------------------------------------------
_FAMILIES: dict[tuple, object] = {}


def family_for(plan: RevisionPlan):
    """The plant family of the plan's plant version (memoised by content hash and parameter
    order: the order names the corners)."""
    memo = (plan.plant_hash, tuple(plan.plant_spec["params"]))
    fam = _FAMILIES.get(memo)
    if fam is None:
        from .systems import build_family

        p = plan.plant_spec
        fam = build_family(p["model"], p["params"], corners=True, samples=p["samples"],
                           seed=p["seed"], fidelity=p["fidelity"], sample_time=p["sample_time"])
        if len(_FAMILIES) > 32:
            _FAMILIES.clear()
        _FAMILIES[memo] = fam
    return fam


def loop_spec_for(plan: RevisionPlan):
    from .engine.loop import LoopSpec
    from .systems import parse_model

    f = plan.loop_form
    ts = f["sample_time"]

    def block(text, what):
        if not text:
            return None
        ev = parse_model(text, sample_time=ts)
        if ev.delay:
            raise ModelError(f"the loop's {what} has a delay; give it as a loop delay instead")
        return ev.system

    return LoopSpec(sensor=block(f["sensor"], "sensor"), prefilter=block(f["prefilter"], "prefilter"),
                    input_delay=f["input_delay"], output_delay=f["output_delay"],
                    sample_time=ts, computation_delay=f["computation_delay"],
                    actuator_limit=f["actuator_limit"])


def controller_for(plan: RevisionPlan):
    from .systems import parse_model

    ev = parse_model(plan.controller_text, sample_time=plan.loop_form["sample_time"])
    if ev.delay:
        raise ModelError("the controller text has a delay; give loop delays on the loop")
    return ev.system


def validate_controller(plan: RevisionPlan) -> None:
    """Refuse a controller that cannot close this loop at all (improper, wrong sample time,
    algebraic loop), with the engine's reason."""
    from .engine.loop import assemble
    from .engine.types import PlantFamily

    fam = family_for(plan)
    assemble(PlantFamily((fam.variants[0],)), controller_for(plan), loop_spec_for(plan))


def _encode(values: np.ndarray) -> list:
    return [("inf" if v > 0 else "-inf") if math.isinf(v) else float(v) for v in values]


def _decode(values: list) -> np.ndarray:
    return np.array([float(v) for v in values], dtype=float)


def compute_plan(plan: RevisionPlan, cached: dict[str, dict], *,
                 workers: int = 1) -> tuple[dict[str, dict], int]:
    """Payloads for every check's metric key: cached ones as given, the rest computed in one
    batched call (its family split over ``workers`` processes when > 1).  Returns (payloads by
    key, number of (metric, settings) requests computed)."""
    payloads: dict[str, dict] = {}
    todo: dict[str, tuple[str, dict]] = {}
    for c in plan.checks:
        k = plan.metric_key(c.metric, c.settings)
        if k in cached:
            payloads[k] = cached[k]
        else:
            todo[k] = (c.metric, c.settings)
    if not todo:
        return payloads, 0
    from .engine.measure import measure_family

    fam = family_for(plan)
    try:
        res = measure_family(fam, controller_for(plan), loop_spec_for(plan), list(todo.values()),
                             workers=workers)
    except LedgerError as e:
        for k, (metric, _) in todo.items():
            payloads[k] = {"metric": metric, "variants": list(fam.names), "values": [],
                           "errors": {"*": str(e)}, "unstable": False}
        return payloads, len(todo)
    for k, (metric, settings) in todo.items():
        r = res.get(metric, settings)
        payloads[k] = {"metric": metric, "variants": list(r.variants), "values": _encode(r.values),
                       "errors": dict(r.variant_errors), "unstable": bool(r.unstable)}
    return payloads, len(todo)


def compute_plans(batch: list[tuple[RevisionPlan, dict]]) -> list[tuple[dict, int]]:
    """:func:`compute_plan` for several plans (one task of a worker process)."""
    return [compute_plan(plan, cached) for plan, cached in batch]


@dataclass(frozen=True)
class Judged:
    verdict: str
    value: float | None
    headroom: float | None
    headroom_fraction: float | None
    worst_variant: str
    pass_fraction: float | None
    variants: int
    reason: str


def judge_payload(check: Check, payload: dict) -> Judged:
    """Worst case over the family by the requirement's own comparator."""
    variants = payload["variants"]
    errors = payload.get("errors") or {}
    n = len(variants)
    if errors:
        first_variant, reason = next(iter(errors.items()))
        more = f" (and {len(errors) - 1} more variant(s))" if len(errors) > 1 else ""
        where = "" if first_variant == "*" else f" on {first_variant}"
        if payload.get("unstable"):
            return Judged("fail", None, None, None, first_variant, 1 - len(errors) / n if n else None,
                          n, f"unstable{where}: {reason}{more}")
        return Judged("error", None, None, None, first_variant, None, n,
                      f"cannot compute{where}: {reason}{more}")
    vals = _decode(payload["values"])
    lim = Limit(check.comparator, check.limit_value, check.unit, check.limit_text)
    h = headroom_array(check.comparator, vals, check.limit_value)
    i = int(np.argmin(h))
    j = judge(lim, float(vals[i]))
    passing = passes_array(check.comparator, vals, check.limit_value)
    return Judged(j.verdict, float(vals[i]), j.headroom, j.headroom_fraction, variants[i],
                  float(passing.mean()), n, "")


def write_results(s: Session, plan: RevisionPlan, revision_id: int,
                  payloads: dict[str, dict], fresh: set[str], *,
                  rows_only: bool = False) -> list[tuple[Check, Judged]] | list[dict]:
    """Write cache rows for ``fresh`` keys and one result per check, in the caller's
    transaction.  ``rows_only``: write nothing, return the result rows (the caller writes them
    through :func:`ledger.chain.append_results`, see :func:`rejudge_cached`)."""
    from .chain import append_results

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
            "value": jd.value if jd.value is None or math.isfinite(jd.value) else
            (1e308 if jd.value > 0 else -1e308),
            "headroom": _finite_or_cap(jd.headroom), "headroom_fraction": _finite_or_cap(jd.headroom_fraction),
            "worst_variant": jd.worst_variant, "pass_fraction": jd.pass_fraction,
            "variants": jd.variants, "reason": jd.reason, "metric_key": k,
            "engine_version": ev, "created_at": now,
        })
    if rows_only:
        return rows
    # one chained batch: row hashes, cache rows, skip of subjects another writer recorded
    # first; serialised with sign-offs (a sign-off compares against live results)
    append_results(s, revision_id, rows, metric_rows)
    return out


# Infinity is not portable across SQL back ends (PostgreSQL accepts it, SQLite stores it, JSON
# does not); results store +-1e308 for +-inf and the read side maps it back.
INF_SENTINEL = 1e308


def _finite_or_cap(x: float | None) -> float | None:
    if x is None or math.isfinite(x):
        return x
    return INF_SENTINEL if x > 0 else -INF_SENTINEL


def uncap(x: float | None) -> float | None:
    if x is None:
        return None
    if x >= INF_SENTINEL:
        return math.inf
    if x <= -INF_SENTINEL:
        return -math.inf
    return x


def load_cached(s: Session, keys: Iterable[str]) -> dict[str, dict]:
    keys = list(set(keys))
    out = {}
    for i in range(0, len(keys), 500):
        for row in s.scalars(select(MetricValue).where(MetricValue.key.in_(keys[i:i + 500]))):
            out[row.key] = json.loads(row.values_json)
    return out
