"""The unit of work: every database read and write of the ledger goes through one of these.

A :class:`UnitOfWork` owns the two connection pools of one ledger (writers start
``BEGIN IMMEDIATE`` on SQLite; readers a deferred snapshot, see :mod:`ledger.store.db`) and
gives three ways in:

* :meth:`UnitOfWork.reading` — one consistent snapshot, no write lock;
* :meth:`UnitOfWork.writing` — one write transaction, committed on success, rolled back on
  any exception;
* :meth:`UnitOfWork.write` — ``fn(session)`` in one write transaction, retried as a whole
  while the database is busy.

This is the one place where database errors are translated: a refused constraint becomes
:class:`~ledger.errors.IntegrityViolation`, a busy database past the retries, a damaged file
or a lost server a :class:`~ledger.errors.SchemaError` (``session_scope`` in
:mod:`ledger.store.db` turns driver errors into one line, with the password scrubbed).  See
docs/architecture.md for the layers above and below.
"""

from __future__ import annotations

import random
import time
from contextlib import contextmanager
from typing import Callable, Iterator, TypeVar

from sqlalchemy.exc import IntegrityError
from sqlalchemy.exc import OperationalError as SAOperationalError
from sqlalchemy.orm import Session, sessionmaker

from ..config import WRITE_RETRIES
from ..errors import IntegrityViolation, SchemaError
from .db import is_sqlite, make_engine, session_scope

__all__ = ["UnitOfWork", "Session", "is_busy"]

T = TypeVar("T")


class UnitOfWork:
    """Connections and transactions of one ledger.

    Attributes
    ----------
    url : str
        The SQLAlchemy URL (with its password; print :func:`ledger.store.db.display_url`).
    retries : int
        Write transactions retried because the database was busy.
    write_retries : int
        How many times one write may be retried (bounded; :data:`ledger.config.WRITE_RETRIES`).
    """

    def __init__(self, url: str, *, write_retries: int = WRITE_RETRIES):
        self.url = url
        self.write_retries = write_retries
        self.retries = 0
        self._engine = make_engine(url)
        self._sessions = sessionmaker(self._engine, expire_on_commit=False)
        self._read_engine = make_engine(url, immediate=False) if is_sqlite(url) else self._engine
        self._read_sessions = sessionmaker(self._read_engine, expire_on_commit=False)

    @property
    def engines(self) -> tuple:
        """The SQLAlchemy engines in use (one, or a writer and a reader for SQLite)."""
        if self._read_engine is self._engine:
            return (self._engine,)
        return (self._engine, self._read_engine)

    def close(self) -> None:
        for e in self.engines:
            e.dispose()

    def reading(self):
        """A session context manager for reads: one consistent snapshot, no write lock."""
        return session_scope(self._read_sessions, self.url)

    @contextmanager
    def writing(self) -> Iterator[Session]:
        """One write transaction (no retry): committed on success, rolled back otherwise; a
        refused constraint is raised as :class:`IntegrityViolation`."""
        with session_scope(self._sessions, self.url) as s:
            try:
                yield s
                s.flush()
            except IntegrityError as e:
                raise IntegrityViolation(f"database refused the change: {e.orig}") from e

    def write(self, fn: Callable[..., T], *args, **kwargs) -> T:
        """Run ``fn(session, *args, **kwargs)`` in one write transaction and return its result.

        A busy database (SQLite lock held past the busy timeout; PostgreSQL serialisation
        failure or deadlock) rolls the whole transaction back and runs ``fn`` again, at most
        :attr:`write_retries` times with growing pauses; each retry is counted in
        :attr:`retries`.  Past that the error says so and nothing is written.
        """
        attempt = 0
        while True:
            try:
                with self.writing() as s:
                    return fn(s, *args, **kwargs)
            except SchemaError as e:
                if not is_busy(e.__cause__) or attempt >= self.write_retries:
                    if is_busy(e.__cause__):
                        raise SchemaError(f"database busy after {attempt} retries; nothing was "
                                          "written, try again") from e
                    raise
                attempt += 1
                self.retries += 1
                time.sleep(min(2.0, 0.05 * 2 ** attempt) * (0.5 + random.random()))


def is_busy(exc) -> bool:
    """True for a database error that a retry may cure (lock contention)."""
    orig = getattr(exc, "orig", None)
    text = str(orig or exc or "").lower()
    if isinstance(exc, SAOperationalError) and ("locked" in text or "busy" in text):
        return True
    code = getattr(orig, "sqlstate", None) or getattr(orig, "pgcode", None)
    return code in ("40001", "40P01")
