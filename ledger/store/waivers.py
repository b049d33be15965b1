"""Waivers and their withdrawals: the SQL of one record kind (the rules: :mod:`ledger.waivers`).

Both are append-only and chained (kinds ``waiver`` and ``waiver_withdrawal``): a waiver is
never edited; withdrawing one appends a withdrawal record.
"""

from __future__ import annotations

from sqlalchemy import select
from sqlalchemy.orm import Session

from ..errors import NotFoundError, WaiverError
from ..records import WaiverInfo
from .baselines import baseline_row, frozen
from .chain import append_link
from .loops import loop_row
from .models import (
    Baseline,
    ChainLink,
    Loop,
    Requirement,
    RequirementLoop,
    Revision,
    Waiver,
    WaiverWithdrawal,
)
from .queries import in_chunks, lock_row, now, scalars_in_chunks, utc
from .requirements import latest_version, requirement_row
from .revisions import revision_or_tip

__all__ = ["add", "withdraw", "all_waivers", "get"]


def add(s: Session, key: str, *, loop: str | None, label: str | None, baseline: str | None,
        reason: str, approver: str, role: str, expires_on: str | None, condition: str,
        author: str) -> int:
    """Insert a waiver of requirement ``key`` on revision ``loop``/``label`` (the tip for
    ``None``) or on baseline ``baseline`` and chain it; returns its id.

    Raises
    ------
    NotFoundError
        The requirement, loop, revision or baseline does not exist.
    WaiverError
        The requirement has no metric, or does not apply to the loop (it has no cell there),
        or applies to no loop the baseline freezes.
    """
    req = requirement_row(s, key)
    v = latest_version(s, req.id)
    if not v.metric:
        raise WaiverError(f"requirement {key!r} has no metric, so no verdict to waive")
    applies = set(s.scalars(select(RequirementLoop.loop_id)
                            .where(RequirementLoop.version_id == v.id)))
    rev_id = base_id = None
    if baseline is not None:
        b = baseline_row(s, baseline)
        cols, _ = frozen(s, b)
        loops = {c["loop"] for c in cols}
        ids = set(s.scalars(select(Loop.id).where(Loop.name.in_(sorted(loops))))) if loops \
            else set()
        if not ids & applies:
            raise WaiverError(f"requirement {key!r} applies to no loop baseline {baseline!r} "
                              "freezes; nothing to waive there")
        base_id = b.id
    else:
        lrow = loop_row(s, loop)
        if lrow.id not in applies:
            raise WaiverError(f"requirement {key!r} does not apply to loop {loop!r}; nothing "
                              "to waive there")
        rev_id = revision_or_tip(s, lrow, label).id
    row = Waiver(requirement_id=req.id, revision_id=rev_id, baseline_id=base_id,
                 reason=reason, approver=approver, role=role, expires_on=expires_on,
                 condition=condition, author=author, created_at=now())
    s.add(row)
    s.flush()
    append_link(s, "waiver", row)
    return row.id


def withdraw(s: Session, waiver_id: int, *, reason: str, approver: str, role: str,
             author: str) -> None:
    """Append the withdrawal of waiver ``waiver_id`` and chain it."""
    w = s.get(Waiver, waiver_id)
    if w is None:
        raise NotFoundError(f"no waiver {waiver_id}; see 'loopledger waiver list'")
    lock_row(s, Waiver, waiver_id)
    if s.scalar(select(WaiverWithdrawal.id).where(WaiverWithdrawal.waiver_id == waiver_id)):
        raise WaiverError(f"waiver {waiver_id} is withdrawn already")
    row = WaiverWithdrawal(waiver_id=waiver_id, reason=reason, approver=approver, role=role,
                           author=author, created_at=now())
    s.add(row)
    s.flush()
    append_link(s, "waiver_withdrawal", row)


def all_waivers(s: Session, *, requirement: str | None = None) -> list[WaiverInfo]:
    """Every waiver (withdrawn ones included), oldest first; of one requirement if given."""
    q = (select(Waiver, Requirement.key, Loop.name, Revision.label, Baseline.name)
         .join(Requirement, Waiver.requirement_id == Requirement.id)
         .outerjoin(Revision, Waiver.revision_id == Revision.id)
         .outerjoin(Loop, Revision.loop_id == Loop.id)
         .outerjoin(Baseline, Waiver.baseline_id == Baseline.id)
         .order_by(Waiver.id))
    if requirement is not None:
        requirement_row(s, requirement)  # names an unknown ID
        q = q.where(Requirement.key == requirement)
    rows = s.execute(q).all()
    if not rows:
        return []
    ids = [r[0].id for r in rows]
    gone = {w.waiver_id: w for w in scalars_in_chunks(
        s, lambda ch: select(WaiverWithdrawal).where(WaiverWithdrawal.waiver_id.in_(ch)), ids)}
    links = in_chunks(s, lambda ch: select(ChainLink.seq, ChainLink.record_id,
                                           ChainLink.record_hash)
                      .where(ChainLink.kind == "waiver", ChainLink.record_id.in_(ch)), ids)
    hashes = {rid: h for _, rid, h in sorted(links)}  # the newest link of each waiver
    frozen_revs: dict[int, tuple] = {}
    out = []
    for w, key, lname, label, bname in rows:
        g = gone.get(w.id)
        if w.baseline_id is not None and w.baseline_id not in frozen_revs:
            cols, _ = frozen(s, s.get(Baseline, w.baseline_id))
            frozen_revs[w.baseline_id] = tuple(f"{c['loop']}/{c['revision']}" for c in cols)
        covers = frozen_revs[w.baseline_id] if w.baseline_id is not None else \
            (f"{lname}/{label}",)
        out.append(WaiverInfo(
            id=w.id, requirement=key, loop=lname, revision=label, baseline=bname,
            reason=w.reason, approver=w.approver, role=w.role, expires_on=w.expires_on,
            condition=w.condition, author=w.author, created_at=utc(w.created_at),
            record_hash=hashes.get(w.id, ""),
            withdrawn_at=utc(g.created_at) if g else None, withdrawn_by=g.approver if g else "",
            withdrawn_role=g.role if g else "", withdrawal_reason=g.reason if g else "",
            covers=covers))
    return out


def get(s: Session, waiver_id: int) -> WaiverInfo:
    w = s.get(Waiver, waiver_id)
    if w is not None:
        key = s.scalar(select(Requirement.key).where(Requirement.id == w.requirement_id))
        for info in all_waivers(s, requirement=key):
            if info.id == waiver_id:
                return info
    raise NotFoundError(f"no waiver {waiver_id}; see 'loopledger waiver list'")
