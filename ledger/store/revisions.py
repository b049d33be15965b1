"""Controller revisions of a loop (append-only, with lineage): the SQL of one record kind."""

from __future__ import annotations

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from ..digital import digital_form
from ..errors import DuplicateError, IntegrityViolation, NotFoundError
from ..records import RevisionInfo
from ..validate import KEY_RE, check_name, design_fields, model_canonical, revision_hash
from .chain import append_link
from .loops import loop_row
from .models import Loop, Revision
from .queries import first_missing, lock_row, now, scalars_in_chunks, utc

__all__ = ["revision_row", "tip_row", "revision_or_tip", "revision_rows", "rows_by_label",
           "info", "make_info", "add", "all_revisions", "get", "ancestry_labels"]


def revision_row(s: Session, loop: Loop, label: str) -> Revision:
    row = s.scalar(select(Revision).where(Revision.loop_id == loop.id, Revision.label == label))
    if row is None:
        raise NotFoundError(f"loop {loop.name!r} has no revision {label!r}")
    return row


def tip_row(s: Session, loop: Loop) -> Revision | None:
    return s.scalar(select(Revision).where(Revision.loop_id == loop.id)
                    .order_by(Revision.seq.desc()).limit(1))


def revision_or_tip(s: Session, loop: Loop, label: str | None) -> Revision:
    """Revision ``label`` of ``loop``, or its tip for ``None`` (an error if it has none)."""
    rev = tip_row(s, loop) if label is None else revision_row(s, loop, label)
    if rev is None:
        raise NotFoundError(f"loop {loop.name!r} has no revisions yet")
    return rev


def revision_rows(s: Session, loop: Loop) -> list[Revision]:
    """Every revision of ``loop`` in the order recorded."""
    return list(s.scalars(select(Revision).where(Revision.loop_id == loop.id)
                          .order_by(Revision.seq)))


def rows_by_label(s: Session, loop: Loop, labels) -> list[Revision]:
    """The revisions ``labels`` of ``loop`` (an error naming the first one missing)."""
    wanted = list(dict.fromkeys(labels))
    revs = scalars_in_chunks(s, lambda ch: select(Revision).where(
        Revision.loop_id == loop.id, Revision.label.in_(ch)), wanted)
    missing = first_missing(wanted, (r.label for r in revs))
    if missing is not None:
        raise NotFoundError(f"loop {loop.name!r} has no revision {missing!r}")
    return revs


def make_info(row: Revision, loop: str, parent: str | None,
              children: tuple[str, ...]) -> RevisionInfo:
    return RevisionInfo(
        loop=loop, label=row.label, seq=row.seq, parent=parent, author=row.author,
        rationale=row.rationale, controller=row.controller_text,
        content_hash=row.content_hash, created_at=utc(row.created_at), children=children,
        discretization=row.discretization or "", number_format=row.number_format or "",
        verified=row.verified_text or "",
        prefilter=row.prefilter_text or "", anti_windup=row.anti_windup or "none",
        anti_windup_gain=row.anti_windup_gain,
    )


def info(s: Session, row: Revision, loop: Loop | None = None) -> RevisionInfo:
    """The view of ``row`` (``loop``: its loop row when the caller holds it already)."""
    parent = s.get(Revision, row.parent_id).label if row.parent_id else None
    kids = s.scalars(select(Revision.label).where(Revision.parent_id == row.id)
                     .order_by(Revision.seq)).all()
    return make_info(row, (loop or row.loop).name, parent, tuple(kids))


def add(s: Session, loop: str, controller: str, *, rationale: str, author: str,
        parent: str | None = "tip", label: str | None = None, discretization: str = "",
        number_format: str = "", prefilter: str = "", anti_windup: str = "none",
        anti_windup_gain: float | None = None) -> tuple[RevisionInfo, bool]:
    """Record a revision (an identical one with the same label is left as it is);
    ``(info, created)``.  ``parent="tip"``: the loop's latest revision; ``None``: a root.
    ``discretization``/``number_format``: the digital form (:mod:`ledger.digital`);
    ``prefilter``: the revision's own prefilter (model text; it takes precedence over the
    loop's); ``anti_windup``: one of :data:`~ledger.validate.ANTI_WINDUP`, with its gain (1/s)
    for back-calculation."""
    lp = loop_row(s, loop)
    lock_row(s, Loop, lp.id)  # serialise label/seq allocation per loop (PostgreSQL)
    what = f"revision of loop {loop!r}"
    if not isinstance(rationale, str) or not rationale.strip():
        raise IntegrityViolation(f"{what}: a rationale is required (why this change?)")
    canonical = model_canonical(controller, what=f"{what}: controller",
                                sample_time=lp.sample_time)
    form = digital_form(controller, lp.sample_time, discretization=discretization,
                        number_format=number_format, what=f"{what}: controller")
    design = design_fields(prefilter, anti_windup, anti_windup_gain, what=what,
                           sample_time=lp.sample_time)
    if parent == "tip":
        prow = tip_row(s, lp)
    elif parent in (None, ""):
        prow = None
    else:
        prow = revision_row(s, lp, parent)
    if label is not None:
        check_name("revision label", label, KEY_RE)
        existing = s.scalar(select(Revision).where(Revision.loop_id == lp.id,
                                                   Revision.label == label))
        if existing is not None:
            same = (existing.controller_canonical == canonical
                    and (existing.discretization or "") == form.discretization
                    and (existing.number_format or "") == form.number_format
                    and existing.prefilter_canonical == design["prefilter_canonical"]
                    and existing.anti_windup == design["anti_windup"]
                    and existing.anti_windup_gain == design["anti_windup_gain"]
                    and existing.rationale == rationale.strip()
                    and existing.parent_id == (prow.id if prow else None))
            if same:
                return info(s, existing, lp), False
            raise DuplicateError(
                f"loop {loop!r} already has revision {label!r} with other content; revisions "
                "are immutable: add a new one with another label"
            )
    seq = (s.scalar(select(func.max(Revision.seq)).where(Revision.loop_id == lp.id)) or 0) + 1
    label = label or f"r{seq}"
    created = now()
    content_hash = revision_hash(
        loop=lp.name, label=label, controller_canonical=canonical,
        parent_hash=prow.content_hash if prow else None, rationale=rationale.strip(),
        author=author, created_at_iso=created.isoformat(), discretization=form.discretization,
        number_format=form.number_format, verified_text=form.verified_text,
        prefilter_canonical=design["prefilter_canonical"], anti_windup=design["anti_windup"],
        anti_windup_gain=design["anti_windup_gain"])
    row = Revision(loop_id=lp.id, label=label, seq=seq, parent_id=prow.id if prow else None,
                   author=author, rationale=rationale.strip(), controller_text=controller,
                   controller_canonical=canonical, content_hash=content_hash,
                   created_at=created, discretization=form.discretization,
                   number_format=form.number_format, verified_text=form.verified_text,
                   **design)
    s.add(row)
    s.flush()
    append_link(s, "revision", row)
    return info(s, row, lp), True


def all_revisions(s: Session, loop: str) -> list[RevisionInfo]:
    """Every revision of ``loop`` in the order recorded (two queries, any length)."""
    lp = loop_row(s, loop)
    rows = revision_rows(s, lp)
    label = {r.id: r.label for r in rows}
    kids: dict[int, list[str]] = {}
    for r in rows:
        if r.parent_id is not None:
            kids.setdefault(r.parent_id, []).append(r.label)
    return [make_info(r, lp.name, label.get(r.parent_id) if r.parent_id else None,
                      tuple(kids.get(r.id, ()))) for r in rows]


def get(s: Session, loop: str, label: str | None = None) -> RevisionInfo:
    lp = loop_row(s, loop)
    return info(s, revision_or_tip(s, lp, label), lp)


def ancestry_labels(s: Session, loop: str, label: str) -> list[str]:
    """Labels of ``label`` and its ancestors, newest first (one light query)."""
    lp = loop_row(s, loop)
    rows = s.execute(select(Revision.id, Revision.label, Revision.parent_id)
                     .where(Revision.loop_id == lp.id)).all()
    by_label = {lbl: (rid, pid) for rid, lbl, pid in rows}
    by_id = {rid: lbl for rid, lbl, _ in rows}
    if label not in by_label:
        raise NotFoundError(f"loop {loop!r} has no revision {label!r}")
    out, cur = [], label
    while cur is not None:
        out.append(cur)
        pid = by_label[cur][1]
        cur = by_id[pid] if pid is not None else None
    return out
