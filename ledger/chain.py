"""The append-only hash chain over the ledger's records.

Every revision, requirement version (with its trace parents and loops), baseline (with its
frozen entries) and sign-off gets one link, appended in the same transaction as the record:

* ``record_hash`` = SHA-256 of the record's canonical content (:func:`record_content`): the
  columns listed in :data:`HASHED_FIELDS` plus the record's child rows;
* ``chain_hash`` = SHA-256 of ``prev_hash : kind : record_id : record_hash``, where
  ``prev_hash`` is the ``chain_hash`` of the previous link (:data:`GENESIS` for the first).

Writers are serialised: SQLite transactions of the ledger start with ``BEGIN IMMEDIATE``; on
PostgreSQL :func:`append_link` takes a transaction-level advisory lock before reading the chain
head.  The audit (``ledger.audit``) recomputes all of this.

The field lists are fixed on purpose: a later schema change to a chained table must decide
explicitly whether the new column joins the hash (and then re-link existing rows in its
migration), instead of silently invalidating every existing link.
"""

from __future__ import annotations

import hashlib
from datetime import datetime, timezone
from typing import Any

from sqlalchemy import Float, select, text
from sqlalchemy.orm import Session

from .errors import IntegrityViolation
from .hashing import sha256_of
from .store.models import (
    Baseline,
    BaselineEntry,
    ChainLink,
    RequirementLoop,
    RequirementParent,
    RequirementVersion,
    Revision,
    Signoff,
)

__all__ = [
    "GENESIS",
    "ADVISORY_LOCK_KEY",
    "HASHED_FIELDS",
    "CHAINED_KINDS",
    "chained_table",
    "record_content",
    "record_hash",
    "link_hash",
    "chain_head",
    "append_link",
]

#: ``prev_hash`` of the first link.
GENESIS = "0" * 64
#: Key of the PostgreSQL transaction-level advisory lock that serialises chain writers.
ADVISORY_LOCK_KEY = 0x6C6C_6368_6169_6E  # fits a signed 64-bit integer

#: Columns of each chained table that enter its record hash (frozen; see the module note).
HASHED_FIELDS: dict[str, tuple[str, ...]] = {
    "revision": ("id", "loop_id", "label", "seq", "parent_id", "author", "rationale",
                 "controller_text", "controller_canonical", "content_hash", "created_at"),
    "requirement_version": ("id", "requirement_id", "number", "title", "statement", "rationale",
                            "method", "status", "metric", "settings_json", "comparator",
                            "limit_value", "limit_text", "author", "note", "content_hash",
                            "created_at"),
    "baseline": ("id", "name", "note", "author", "supersedes_id", "matrix_hash", "created_at"),
    "signoff": ("id", "baseline_id", "name", "role", "statement", "author", "matrix_hash",
                "chain_head", "signed_at"),
}

_TABLES = {
    "revision": Revision.__table__,
    "requirement_version": RequirementVersion.__table__,
    "baseline": Baseline.__table__,
    "signoff": Signoff.__table__,
}

#: Record kinds that carry chain links, in the order the audit reports them.
CHAINED_KINDS = tuple(HASHED_FIELDS)


def chained_table(kind: str):
    """The SQLAlchemy table holding records of ``kind`` (one of :data:`CHAINED_KINDS`)."""
    if kind not in _TABLES:
        raise IntegrityViolation(f"record kind {kind!r} is not chained; use one of {CHAINED_KINDS}")
    return _TABLES[kind]


def _norm(value: Any, *, is_float: bool) -> Any:
    """One column value in a form that survives a database round trip unchanged."""
    if isinstance(value, datetime):
        if value.tzinfo is not None:
            value = value.astimezone(timezone.utc).replace(tzinfo=None)
        return value.isoformat(sep=" ", timespec="microseconds")
    if is_float and value is not None:
        return float(value)
    return value


def record_content(s: Session, kind: str, record_id: int) -> dict | None:
    """Canonical content of one chained record as stored now, or ``None`` if the row is gone.

    Parameters
    ----------
    s : Session
        Any session; the rows are read through it (so unflushed ORM changes are flushed first).
    kind : str
        One of :data:`CHAINED_KINDS`.
    record_id : int
        Primary key of the record.
    """
    if kind not in _TABLES:
        raise IntegrityViolation(f"record kind {kind!r} is not chained; use one of {CHAINED_KINDS}")
    table = _TABLES[kind]
    row = s.execute(select(table).where(table.c.id == record_id)).mappings().first()
    if row is None:
        return None
    fields = {
        name: _norm(row[name], is_float=isinstance(table.c[name].type, Float))
        for name in HASHED_FIELDS[kind]
    }
    content: dict[str, Any] = {"kind": kind, "fields": fields}
    if kind == "requirement_version":
        content["parents"] = sorted(s.scalars(select(RequirementParent.parent_id).where(
            RequirementParent.version_id == record_id)).all())
        content["loops"] = sorted(s.scalars(select(RequirementLoop.loop_id).where(
            RequirementLoop.version_id == record_id)).all())
    elif kind == "baseline":
        e = BaselineEntry.__table__
        content["entries"] = [
            [r.id, r.kind, r.revision_id, r.requirement_version_id, r.plant_version_id, r.data_json]
            for r in s.execute(select(e).where(e.c.baseline_id == record_id).order_by(e.c.id))
        ]
    return content


def record_hash(s: Session, kind: str, record_id: int) -> str | None:
    """SHA-256 (hex) of :func:`record_content`; ``None`` if the row does not exist."""
    content = record_content(s, kind, record_id)
    return None if content is None else sha256_of(content)


def link_hash(prev_hash: str, kind: str, record_id: int, rec_hash: str) -> str:
    """``SHA-256(prev_hash : kind : record_id : record_hash)`` as 64 hex digits."""
    data = f"{prev_hash}:{kind}:{int(record_id)}:{rec_hash}".encode("utf-8")
    return hashlib.sha256(data).hexdigest()


def chain_head(s: Session) -> str:
    """``chain_hash`` of the newest link, or :data:`GENESIS` for an empty chain."""
    head = s.scalar(select(ChainLink.chain_hash).order_by(ChainLink.seq.desc()).limit(1))
    return head or GENESIS


def lock(s: Session) -> None:
    """Serialise with every chain writer, sign-offs and result writes (PostgreSQL advisory
    lock held to the end of the transaction; SQLite writers are serialised already)."""
    if s.get_bind().dialect.name == "postgresql":
        s.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": ADVISORY_LOCK_KEY})
    # SQLite: the ledger's write transactions begin IMMEDIATE, which already serialises them.


def append_link(s: Session, kind: str, row: Any) -> ChainLink:
    """Append the link of a freshly flushed record ``row`` (same transaction).

    Parameters
    ----------
    s : Session
        The write session that inserted ``row``.
    kind : str
        One of :data:`CHAINED_KINDS`.
    row
        The ORM object (its ``id`` must be assigned, i.e. flushed).

    Returns
    -------
    ChainLink
        The new link (flushed).
    """
    if getattr(row, "id", None) is None:
        raise IntegrityViolation(f"{kind} record must be flushed before it is chained")
    s.flush()
    lock(s)
    head = s.execute(select(ChainLink.seq, ChainLink.chain_hash)
                     .order_by(ChainLink.seq.desc()).limit(1)).first()
    seq, prev = (head.seq + 1, head.chain_hash) if head else (1, GENESIS)
    rh = record_hash(s, kind, row.id)
    if rh is None:
        raise IntegrityViolation(f"{kind} {row.id} is not in the database; cannot chain it")
    link = ChainLink(seq=seq, kind=kind, record_id=row.id, record_hash=rh, prev_hash=prev,
                     chain_hash=link_hash(prev, kind, row.id, rh),
                     created_at=datetime.now(timezone.utc))
    s.add(link)
    s.flush()
    return link
