"""Query helpers shared by the record modules of the store.

:func:`in_chunks` is the one place a long ``IN (...)`` list is split (SQLite and PostgreSQL
limit the number of bound parameters per statement).
"""

from __future__ import annotations

from datetime import datetime, timezone
from typing import Callable, Iterable, Iterator, Sequence

from sqlalchemy import select
from sqlalchemy.orm import Session

from ..config import IN_CHUNK
from ..errors import NotFoundError

__all__ = ["chunks", "in_chunks", "scalars_in_chunks", "one", "lock_row", "now", "utc",
           "first_missing"]


def chunks(values: Iterable, size: int = IN_CHUNK) -> Iterator[list]:
    """``values`` (duplicates dropped, order kept) in lists of at most ``size``."""
    vals = list(dict.fromkeys(values))
    for i in range(0, len(vals), size):
        yield vals[i:i + size]


def in_chunks(s: Session, make_query: Callable[[list], object], values: Iterable,
              size: int = IN_CHUNK) -> list:
    """Rows of ``make_query(chunk)`` for every chunk of ``values`` (one statement each)."""
    out: list = []
    for ch in chunks(values, size):
        out.extend(s.execute(make_query(ch)).all())
    return out


def scalars_in_chunks(s: Session, make_query: Callable[[list], object], values: Iterable,
                      size: int = IN_CHUNK) -> list:
    """Like :func:`in_chunks`, the first column (or ORM object) of every row."""
    out: list = []
    for ch in chunks(values, size):
        out.extend(s.scalars(make_query(ch)))
    return out


def one(s: Session, model, column, value, missing: str):
    """The row of ``model`` whose ``column`` equals ``value``; ``NotFoundError(missing)`` if
    there is none."""
    row = s.scalar(select(model).where(column == value))
    if row is None:
        raise NotFoundError(missing)
    return row


def lock_row(s: Session, model, row_id: int) -> None:
    """Row lock for read-then-write sequences on PostgreSQL (SQLite writers already hold the
    database write lock from BEGIN IMMEDIATE)."""
    if s.get_bind().dialect.name == "postgresql":
        s.execute(select(model.id).where(model.id == row_id).with_for_update())


def now() -> datetime:
    return datetime.now(timezone.utc)


def utc(dt: datetime) -> datetime:
    """A stored time stamp as an aware UTC datetime (SQLite returns naive ones)."""
    return dt if dt.tzinfo else dt.replace(tzinfo=timezone.utc)


def first_missing(wanted: Sequence, found: Iterable):
    """The first of ``wanted`` not in ``found``, or ``None``."""
    got = set(found)
    for w in wanted:
        if w not in got:
            return w
    return None
