"""Requirements, their versions and their trace (parents) and loops: the SQL of one record
kind."""

from __future__ import annotations

import json
from collections import deque
from typing import Iterable

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from ..errors import DuplicateError, IntegrityViolation, LedgerError, NotFoundError
from ..records import RequirementInfo
from ..validate import KEY_RE, check_name, requirement_fields, requirement_hash
from .chain import append_link
from .loops import loop_row
from .models import Loop, Requirement, RequirementLoop, RequirementParent, RequirementVersion
from .queries import in_chunks, lock_row, now, one, utc

__all__ = ["requirement_row", "latest_version", "latest_versions", "latest_subquery",
           "current_subquery", "infos", "info", "write_version", "upsert", "edit",
           "all_requirements", "get", "history", "applicable_versions", "exists", "keys", "add_starters"]

#: the changes :func:`edit` accepts
EDITABLE = frozenset({"title", "statement", "rationale", "method", "status", "metric",
                      "settings", "limit", "parents", "loops", "yield_claim", "confidence"})


def requirement_row(s: Session, key: str) -> Requirement:
    return one(s, Requirement, Requirement.key, key, f"no requirement with ID {key!r}")


def exists(s: Session, key: str) -> bool:
    return s.scalar(select(Requirement.id).where(Requirement.key == key)) is not None


def keys(s: Session) -> set[str]:
    return set(s.scalars(select(Requirement.key)))


def latest_version(s: Session, req_id: int) -> RequirementVersion:
    return s.scalar(select(RequirementVersion).where(RequirementVersion.requirement_id == req_id)
                    .order_by(RequirementVersion.number.desc()).limit(1))


def latest_subquery():
    """(requirement_id, n): the newest version number of every requirement."""
    return (select(RequirementVersion.requirement_id,
                   func.max(RequirementVersion.number).label("n"))
            .group_by(RequirementVersion.requirement_id).subquery())


def current_subquery():
    """(id, requirement_id) of the latest version of every requirement not retired."""
    latest = latest_subquery()
    return (select(RequirementVersion.id, RequirementVersion.requirement_id)
            .join(latest, (latest.c.requirement_id == RequirementVersion.requirement_id)
                  & (latest.c.n == RequirementVersion.number))
            .where(RequirementVersion.status != "retired").subquery())


def latest_versions(s: Session) -> list[tuple[Requirement, RequirementVersion]]:
    """(requirement, latest version) for every requirement, by ID, in one query."""
    latest = latest_subquery()
    rows = s.execute(
        select(Requirement, RequirementVersion)
        .join(RequirementVersion, RequirementVersion.requirement_id == Requirement.id)
        .join(latest, (latest.c.requirement_id == RequirementVersion.requirement_id)
              & (latest.c.n == RequirementVersion.number))
        .order_by(Requirement.key)
    ).all()
    return [(r, v) for r, v in rows]


def infos(s: Session, pairs: list[tuple[Requirement, RequirementVersion]]
          ) -> list[RequirementInfo]:
    """Views of many requirement versions with a fixed number of queries."""
    from ..catalogue import metric_unit

    if not pairs:
        return []
    vids = [v.id for _, v in pairs]
    rids = [r.id for r, _ in pairs]
    parents: dict[int, list[str]] = {}
    loops: dict[int, list[str]] = {}
    for vid, key in in_chunks(s, lambda ch: select(RequirementParent.version_id, Requirement.key)
                              .join(Requirement, Requirement.id == RequirementParent.parent_id)
                              .where(RequirementParent.version_id.in_(ch)), vids):
        parents.setdefault(vid, []).append(key)
    for vid, name in in_chunks(s, lambda ch: select(RequirementLoop.version_id, Loop.name)
                               .join(Loop, Loop.id == RequirementLoop.loop_id)
                               .where(RequirementLoop.version_id.in_(ch)), vids):
        loops.setdefault(vid, []).append(name)
    latest = dict(in_chunks(s, lambda ch: select(RequirementVersion.requirement_id,
                                                 func.max(RequirementVersion.number))
                            .where(RequirementVersion.requirement_id.in_(ch))
                            .group_by(RequirementVersion.requirement_id), rids))
    from ..yieldbound import split_yield

    units: dict[str, str] = {}
    out = []
    for req, v in pairs:
        settings, target, confidence = split_yield(json.loads(v.settings_json))
        unit = ""
        if v.metric:
            if v.metric not in units:
                try:
                    units[v.metric] = metric_unit(v.metric)
                except LedgerError:
                    units[v.metric] = "?"
            unit = units[v.metric]
        out.append(RequirementInfo(
            key=req.key, version=v.number, title=v.title, statement=v.statement,
            rationale=v.rationale, method=v.method, status=v.status, metric=v.metric,
            settings=settings, yield_target=target, confidence=confidence,
            comparator=v.comparator,
            limit_value=v.limit_value, limit_text=v.limit_text, unit=unit,
            parents=tuple(sorted(parents.get(v.id, ()))),
            loops=tuple(sorted(loops.get(v.id, ()))),
            author=v.author, note=v.note, content_hash=v.content_hash,
            created_at=utc(v.created_at), latest_version=latest[req.id],
        ))
    return out


def info(s: Session, req: Requirement, v: RequirementVersion) -> RequirementInfo:
    return infos(s, [(req, v)])[0]


def _parent_graph(s: Session) -> dict[str, set[str]]:
    """Latest trace edges: requirement key -> keys it derives from."""
    graph: dict[str, set[str]] = {}
    for req in s.scalars(select(Requirement)).all():
        v = latest_version(s, req.id)
        graph[req.key] = {s.get(Requirement, p.parent_id).key for p in v.parents}
    return graph


def _check_no_cycle(s: Session, key: str, parents: Iterable[str]) -> None:
    graph = _parent_graph(s)
    graph[key] = set(parents)
    # is key reachable from any of its parents by following parent edges?
    seen, todo = set(), deque(parents)
    while todo:
        k = todo.popleft()
        if k == key:
            raise IntegrityViolation(
                f"requirement {key!r}: trace would form a cycle through {sorted(parents)}"
            )
        if k in seen:
            continue
        seen.add(k)
        todo.extend(graph.get(k, ()))


def write_version(s: Session, req: Requirement, number: int, fields: dict, author: str,
                  note: str) -> RequirementVersion:
    """Insert version ``number`` of ``req`` with its trace and loops, and chain it."""
    v = RequirementVersion(
        requirement_id=req.id, number=number, author=author, note=note or "",
        content_hash=requirement_hash(fields), created_at=now(),
        **{k: fields[k] for k in fields if k not in ("parents", "loops")},
    )
    for pk in fields["parents"]:
        v.parents.append(RequirementParent(parent_id=requirement_row(s, pk).id))
    for ln in fields["loops"]:
        v.loops.append(RequirementLoop(loop_id=loop_row(s, ln).id))
    s.add(v)
    s.flush()
    append_link(s, "requirement_version", v)
    return v


def plant_units(s: Session, loop: str) -> tuple[str, str, str]:
    """``(loop, input unit, output unit)`` of the loop's current plant version."""
    from .plants import latest_version

    pv = latest_version(s, loop_row(s, loop).plant_id)
    return (loop, pv.input_unit if pv else "", pv.output_unit if pv else "")


def upsert(s: Session, key: str, *, title, statement, author: str, rationale="",
           method="analysis", status="draft", metric=None, settings=None, limit=None,
           parents=(), loops=(), note="", must_exist: bool | None = None, yield_claim=None,
           confidence=None) -> tuple[RequirementInfo, bool]:
    """Add a requirement or a new version of it when anything changed; ``(info, created)``.
    ``must_exist``: ``True`` refuses a new ID, ``False`` an existing one.  ``yield_claim``
    (``'99 % at 95 %'``) and ``confidence`` (``'90 %'``): ``ledger.yieldbound.
    yield_settings``."""
    check_name("requirement ID", key, KEY_RE)
    fields = requirement_fields(key, title=title, statement=statement, rationale=rationale,
                                method=method, status=status, metric=metric, settings=settings,
                                limit=limit, parents=parents, loops=loops,
                                yield_claim=yield_claim, confidence=confidence,
                                plant_units=lambda names: [plant_units(s, ln) for ln in names])
    for pk in fields["parents"]:
        requirement_row(s, pk)
    for ln in fields["loops"]:
        loop_row(s, ln)
    req = s.scalar(select(Requirement).where(Requirement.key == key))
    if req is None:
        if must_exist:
            raise NotFoundError(f"no requirement with ID {key!r}")
        _check_no_cycle(s, key, fields["parents"])
        req = Requirement(key=key, created_at=now())
        s.add(req)
        s.flush()
        append_link(s, "requirement", req)
        v = write_version(s, req, 1, fields, author, note)
        return info(s, req, v), True
    if must_exist is False:
        raise DuplicateError(f"requirement {key!r} exists; edit it to make a new version")
    lock_row(s, Requirement, req.id)  # serialise version numbering (PostgreSQL)
    latest = latest_version(s, req.id)
    if latest.content_hash == requirement_hash(fields):
        return info(s, req, latest), False
    _check_no_cycle(s, key, fields["parents"])
    v = write_version(s, req, latest.number + 1, fields, author, note)
    return info(s, req, v), True


def edit(s: Session, key: str, *, author: str, note: str = "", **changes
         ) -> tuple[RequirementInfo, bool]:
    """A new version of ``key`` with ``changes`` (see :data:`EDITABLE`) applied."""
    unknown = set(changes) - EDITABLE
    if unknown:
        raise IntegrityViolation(f"cannot change {sorted(unknown)}; allowed: {sorted(EDITABLE)}")
    req = requirement_row(s, key)
    cur = info(s, req, latest_version(s, req.id))
    base = dict(title=cur.title, statement=cur.statement, rationale=cur.rationale,
                method=cur.method, status=cur.status, metric=cur.metric,
                settings=cur.settings, limit=cur.limit_text or None,
                parents=cur.parents, loops=cur.loops,
                yield_claim=(cur.yield_target, None) if cur.yield_target else None,
                confidence=cur.confidence)
    if "yield_claim" in changes and "confidence" not in changes:
        base["confidence"] = None  # the new claim brings its own confidence
    if "metric" in changes and changes["metric"] != cur.metric and "limit" not in changes:
        raise IntegrityViolation(f"requirement {key!r}: a new metric needs a new limit")
    base.update(changes)
    return upsert(s, key, author=author, note=note, must_exist=True, **base)


def all_requirements(s: Session, *, status: str | None = None, loop: str | None = None,
                     include_retired: bool = True) -> list[RequirementInfo]:
    """Latest version of every requirement, by ID; optionally filtered."""
    out = []
    for r in infos(s, latest_versions(s)):
        if status and r.status != status:
            continue
        if not include_retired and r.status == "retired":
            continue
        if loop and loop not in r.loops:
            continue
        out.append(r)
    return out


def get(s: Session, key: str, version: int | None = None) -> RequirementInfo:
    req = requirement_row(s, key)
    if version is None:
        v = latest_version(s, req.id)
    else:
        v = s.scalar(select(RequirementVersion).where(
            RequirementVersion.requirement_id == req.id,
            RequirementVersion.number == int(version)))
        if v is None:
            raise NotFoundError(f"requirement {key!r} has no version {version}")
    return info(s, req, v)


def history(s: Session, key: str) -> list[RequirementInfo]:
    req = requirement_row(s, key)
    rows = s.scalars(select(RequirementVersion)
                     .where(RequirementVersion.requirement_id == req.id)
                     .order_by(RequirementVersion.number)).all()
    return infos(s, [(req, v) for v in rows])


def applicable_versions(s: Session, loop_id: int, keys: Iterable[str] | None = None
                        ) -> list[tuple[str, RequirementVersion]]:
    """(key, version) of the latest, non-retired, metric-bearing requirement versions that
    apply to the loop, by key."""
    latest = latest_subquery()
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
    return [(k, v) for k, v in s.execute(query).all()]


def add_starters(s: Session, loop: str, kind: str | None, *, author: str
                 ) -> list[RequirementInfo]:
    """Record the starter set of ``loop``'s kind (``ledger.starters``) as draft requirements
    ``<LOOP>-S01``...; IDs that exist already are left as they are."""
    from ..starters import DIGITAL_STARTERS, starter_set

    lp = loop_row(s, loop)
    out = []
    extra = DIGITAL_STARTERS if lp.sample_time is not None else ()
    for st in (*starter_set(kind or lp.kind), *extra):
        key = f"{lp.name.upper()}-{st.suffix}"[:40]
        if exists(s, key):
            continue
        info_, _ = upsert(
            s, key, title=st.title, statement=st.statement, author=author,
            rationale=st.rationale + " (Starter limit, common practice: edit it to "
            "fit this system's needs.)", method="analysis", status="draft",
            metric=st.metric, settings=dict(st.settings), limit=st.limit,
            loops=[lp.name], must_exist=False)
        out.append(info_)
    return out
