"""Engine and session set-up.

No engine is made at import time.  SQLite connections get foreign keys, WAL, a busy timeout and
``BEGIN IMMEDIATE`` transactions (pysqlite's own transaction handling lets two writers each read
and then overwrite, losing updates; an immediate write lock serialises them instead).
"""

from __future__ import annotations

import os
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from sqlalchemy import create_engine, event
from sqlalchemy.engine import Engine, make_url
from sqlalchemy.exc import ArgumentError, DatabaseError, IntegrityError, OperationalError
from sqlalchemy.orm import Session, sessionmaker

from ..errors import SchemaError

__all__ = ["DEFAULT_PATH", "resolve_url", "make_engine", "session_scope", "is_sqlite"]

DEFAULT_PATH = "loopledger.db"
BUSY_TIMEOUT_MS = 10_000


def resolve_url(target: str | os.PathLike | None = None) -> str:
    """Turn a path, a URL or ``None`` into a SQLAlchemy URL.

    ``None`` means ``$LOOPLEDGER_DB`` if set, else ``./loopledger.db``.  A plain path becomes an
    SQLite URL; anything with ``://`` is taken as a URL (e.g. ``postgresql+psycopg://...``).
    """
    if target is None:
        target = os.environ.get("LOOPLEDGER_DB") or DEFAULT_PATH
    text = os.fspath(target)
    if "://" in text:
        try:
            make_url(text)
        except ArgumentError as e:
            raise SchemaError(f"not a database URL: {text!r}") from e
        return text
    return "sqlite:///" + str(Path(text).expanduser().resolve())


def is_sqlite(url: str) -> bool:
    return make_url(url).get_backend_name() == "sqlite"


def sqlite_path(url: str) -> Path | None:
    u = make_url(url)
    if u.get_backend_name() != "sqlite" or not u.database or u.database == ":memory:":
        return None
    return Path(u.database)


def _install_sqlite_hooks(engine: Engine, *, wal: bool, immediate: bool) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn, _record):  # pragma: no cover - exercised through every test
        dbapi_conn.isolation_level = None  # we issue BEGIN ourselves
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA foreign_keys=ON")
        cur.execute(f"PRAGMA busy_timeout={BUSY_TIMEOUT_MS}")
        if wal:
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=NORMAL")
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn):
        conn.exec_driver_sql("BEGIN IMMEDIATE" if immediate else "BEGIN")


def make_engine(url: str, *, foreign_keys: bool = True, immediate: bool = True) -> Engine:
    """Create an engine for ``url`` with the ledger's connection settings.

    ``immediate=True`` (writers) takes SQLite's write lock at BEGIN so that read-then-write
    transactions serialise instead of losing updates; ``immediate=False`` (readers) starts a
    deferred transaction that sees one consistent snapshot without blocking writers (WAL).
    """
    if is_sqlite(url):
        path = sqlite_path(url)
        engine = create_engine(url, future=True)
        _install_sqlite_hooks(engine, wal=path is not None, immediate=immediate)
        if not foreign_keys:
            @event.listens_for(engine, "connect")
            def _fk_off(dbapi_conn, _record):
                dbapi_conn.execute("PRAGMA foreign_keys=OFF")
        return engine
    return create_engine(url, future=True, pool_pre_ping=True)


@contextmanager
def session_scope(factory: sessionmaker) -> Iterator[Session]:
    """One transaction: commit on success, roll back on any exception.

    Database-level failures other than constraint violations (a damaged file, a lock held past
    the busy timeout, a lost server) become a one-line :class:`SchemaError`.
    """
    session = factory()
    try:
        yield session
        session.commit()
    except (IntegrityError,):
        session.rollback()
        raise
    except OperationalError as e:
        session.rollback()
        raise SchemaError(f"database error: {e.orig}; nothing was written") from e
    except DatabaseError as e:
        session.rollback()
        raise SchemaError(f"database damaged or not a ledger: {e.orig}") from e
    except BaseException:
        session.rollback()
        raise
    finally:
        session.close()
