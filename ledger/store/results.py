"""Results (one verdict per revision, requirement version and plant version) and the cache of
metric values they are judged from: the SQL of one record kind.

A result names the requirement version and plant version it judged; when either is no longer
the latest the result reads as ``stale`` (derived here at read time, never written).
"""

from __future__ import annotations

import json
import math
from typing import Iterable, Sequence

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from ..records import ResultInfo
from ..yieldbound import yield_fields
from .loops import loop_row
from .models import (
    Loop,
    MetricValue,
    PlantVersion,
    Requirement,
    RequirementVersion,
    Result,
    Revision,
)
from .plants import latest_version as latest_plant_version
from .queries import in_chunks, scalars_in_chunks, utc
from .requirements import current_subquery
from .revisions import revision_or_tip, rows_by_label

__all__ = ["INF_SENTINEL", "cap", "uncap", "for_revisions", "of_revision", "of_revisions",
           "verdict_counts", "load_cached", "judged_version_ids", "judged_pairs", "counts"]

# Infinity is not portable across SQL back ends (PostgreSQL accepts it, SQLite stores it, JSON
# does not); results store +-1e308 for +-inf and the read side maps it back.
INF_SENTINEL = 1e308


def cap(x: float | None) -> float | None:
    """``x`` as stored: +-inf as +-:data:`INF_SENTINEL`; zero as +0.0 (SQLite gives -0.0 back
    as 0.0, so a row hashed with -0.0 would no longer match its stored row)."""
    if x is None:
        return x
    if x == 0:
        return 0.0
    if math.isfinite(x):
        return x
    return INF_SENTINEL if x > 0 else -INF_SENTINEL


def uncap(x: float | None) -> float | None:
    """A stored value as the user sees it: +-:data:`INF_SENTINEL` as +-inf."""
    if x is None:
        return None
    if x >= INF_SENTINEL:
        return math.inf
    if x <= -INF_SENTINEL:
        return -math.inf
    return x


def current_engine() -> str:
    """The engine version in force; a result computed by another one is stale."""
    from ..engine.results import engine_version

    return engine_version()


def for_revisions(s: Session, lp: Loop, revs: list[Revision], include_stale: bool,
                  keys: Sequence[str] | None = None) -> dict[str, list[ResultInfo]]:
    """Per revision label: the best result of each requirement (fresh over stale, newest
    versions first), a fixed number of queries whatever the number of revisions."""
    from ..catalogue import metric_unit
    from ..units import resolve_unit

    pv = latest_plant_version(s, lp.plant_id)
    by_id = {r.id: r for r in revs}
    only = [Requirement.key.in_(list(keys))] if keys is not None else []
    rows = in_chunks(s, lambda ch: (
        select(Result, RequirementVersion, Requirement.key, Requirement.id,
               PlantVersion.id, PlantVersion.number, PlantVersion.samples)
        .join(RequirementVersion, Result.requirement_version_id == RequirementVersion.id)
        .join(Requirement, RequirementVersion.requirement_id == Requirement.id)
        .join(PlantVersion, Result.plant_version_id == PlantVersion.id)
        .where(Result.revision_id.in_(ch), *only)), list(by_id))
    req_ids = list({row[3] for row in rows})
    latest: dict[int, tuple[int, str]] = {}  # requirement id -> (latest version id, status)
    if req_ids:
        sub = (select(RequirementVersion.requirement_id,
                      func.max(RequirementVersion.number).label("n"))
               .where(RequirementVersion.requirement_id.in_(req_ids))
               .group_by(RequirementVersion.requirement_id).subquery())
        for rid, vid, status in s.execute(
                select(RequirementVersion.requirement_id, RequirementVersion.id,
                       RequirementVersion.status)
                .join(sub, (sub.c.requirement_id == RequirementVersion.requirement_id)
                      & (sub.c.n == RequirementVersion.number))):
            latest[rid] = (vid, status)
    best: dict[tuple[int, str], tuple] = {}
    engine = current_engine()
    rpv_samples = {row[4]: row[6] for row in rows}
    for res, rv, key, rid, rpv_id, rpv_number, _ in rows:
        lv_id, lv_status = latest[rid]
        if lv_status == "retired":
            continue
        # stale: judged on an older requirement or plant version, or by another engine
        stale = rv.id != lv_id or rpv_id != pv.id or res.engine_version != engine
        rank = (not stale, rv.number, rpv_number, res.id)
        k = (res.revision_id, key)
        if k not in best or rank > best[k][0]:
            best[k] = (rank, res, rv, rpv_number, stale, rpv_samples[rpv_id])
    out: dict[str, list[ResultInfo]] = {r.label: [] for r in revs}
    for (rev_id, key) in sorted(best, key=lambda k: (k[0], k[1])):
        _, res, rv, rpv_number, stale, drawn = best[(rev_id, key)]
        if stale and not include_stale:
            continue
        settings = json.loads(rv.settings_json) if rv.settings_json else {}
        out[by_id[rev_id].label].append(ResultInfo(
            loop=lp.name, revision=by_id[rev_id].label, requirement=key,
            requirement_version=rv.number, plant_version=rpv_number,
            verdict="stale" if stale else res.verdict, value=uncap(res.value),
            unit=(resolve_unit(rv.metric, metric_unit(rv.metric), pv.input_unit, pv.output_unit)
                  if rv.metric else ""), limit_text=rv.limit_text,
            headroom=uncap(res.headroom), headroom_fraction=uncap(res.headroom_fraction),
            worst_variant=res.worst_variant, pass_fraction=res.pass_fraction,
            variants=res.variants, reason=res.reason, engine_version=res.engine_version,
            created_at=utc(res.created_at), stale=stale,
            **yield_fields(*_sample_counts(res, drawn), settings.get("yield_target"),
                           settings.get("confidence")),
        ))
    return out


def _sample_counts(res: Result, drawn: int) -> tuple[int | None, int | None]:
    """(samples, passing samples) of a result: as recorded; for a result written before the
    counts were kept (migration 0012_yield), exact only when every member passed (then every
    one of the plant version's ``drawn`` samples did), unknown (``(drawn, None)``) otherwise."""
    if res.samples is not None:
        return res.samples, res.sample_passes
    if not drawn or res.value is None:
        return None, None
    if res.verdict == "pass" and res.pass_fraction == 1.0:
        return drawn, drawn
    return drawn, None


def of_revision(s: Session, loop: str, label: str | None = None, *,
                include_stale: bool = True) -> list[ResultInfo]:
    lp = loop_row(s, loop)
    rev = revision_or_tip(s, lp, label)
    return for_revisions(s, lp, [rev], include_stale)[rev.label]


def of_revisions(s: Session, loop: str, labels: Sequence[str], *, include_stale: bool = True,
                 keys: Sequence[str] | None = None) -> dict[str, list[ResultInfo]]:
    lp = loop_row(s, loop)
    return for_revisions(s, lp, rows_by_label(s, lp, labels), include_stale, keys)


def verdict_counts(s: Session, loop: str, labels: Sequence[str] | None = None
                   ) -> dict[str, dict[str, int]]:
    """Per revision label of ``loop`` (all, or ``labels``): how many current requirements
    pass, fail, are in error or are stale — counted in the database."""
    lp = loop_row(s, loop)
    pv = latest_plant_version(s, lp.plant_id)
    current = current_subquery()
    q = select(Revision.id, Revision.label).where(Revision.loop_id == lp.id)
    if labels is not None:
        q = q.where(Revision.label.in_(list(labels)))
    wanted = labels
    by_id = dict(s.execute(q).all())
    only = [Revision.id.in_(list(by_id))] if wanted is not None else []
    out = {lbl: {"pass": 0, "fail": 0, "error": 0, "stale": 0} for lbl in by_id.values()}
    fresh_total: dict[int, int] = {}
    for rid, verdict, n in s.execute(
            select(Result.revision_id, Result.verdict, func.count())
            .join(current, current.c.id == Result.requirement_version_id)
            .join(Revision, Revision.id == Result.revision_id)
            .where(Revision.loop_id == lp.id, Result.plant_version_id == pv.id,
                   Result.engine_version == current_engine(), *only)
            .group_by(Result.revision_id, Result.verdict)):
        out[by_id[rid]][verdict] = out[by_id[rid]].get(verdict, 0) + n
        fresh_total[rid] = fresh_total.get(rid, 0) + n
    judged = RequirementVersion.__table__.alias("judged")
    for rid, n in s.execute(
            select(Result.revision_id, func.count(func.distinct(judged.c.requirement_id)))
            .join(judged, judged.c.id == Result.requirement_version_id)
            .join(current, current.c.requirement_id == judged.c.requirement_id)
            .join(Revision, Revision.id == Result.revision_id)
            .where(Revision.loop_id == lp.id, *only)
            .group_by(Result.revision_id)):
        out[by_id[rid]]["stale"] = n - fresh_total.get(rid, 0)
    return out


def load_cached(s: Session, keys: Iterable[str]) -> dict[str, dict]:
    """Cached metric-value payloads by key (the keys found)."""
    return {row.key: json.loads(row.values_json) for row in scalars_in_chunks(
        s, lambda ch: select(MetricValue).where(MetricValue.key.in_(ch)), set(keys))}


def judged_version_ids(s: Session, revision_id: int, plant_version_id: int) -> set[int]:
    """Requirement versions with a result on ``revision_id`` against that plant version, by
    the engine in force."""
    return set(s.scalars(select(Result.requirement_version_id).where(
        Result.revision_id == revision_id, Result.plant_version_id == plant_version_id,
        Result.engine_version == current_engine())))


def judged_pairs(s: Session, plant_version_id: int, version_ids: Iterable[int]
                 ) -> set[tuple[int, int]]:
    """(revision id, requirement version id) of the results against that plant version of
    the requirement versions ``version_ids``, by the engine in force."""
    engine = current_engine()
    return set(in_chunks(s, lambda ch: select(Result.revision_id, Result.requirement_version_id)
                         .where(Result.plant_version_id == plant_version_id,
                                Result.engine_version == engine,
                                Result.requirement_version_id.in_(ch)), version_ids))


def counts(s: Session) -> dict[str, int]:
    """Rows per table of the records with history (used by tests and the CLI summary)."""
    from . import models as m

    return {
        t.__tablename__: s.scalar(select(func.count()).select_from(t))
        for t in (m.Plant, m.PlantVersion, m.Loop, m.Revision, m.Requirement,
                  m.RequirementVersion, m.RequirementParent, m.RequirementLoop,
                  m.Result, m.MetricValue, m.Baseline, m.Signoff, m.Waiver,
                  m.WaiverWithdrawal, m.ChainLink)
    }
