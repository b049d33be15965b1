"""Engine and session set-up.

No engine is made at import time.  SQLite connections get foreign keys, WAL, a busy timeout and
``BEGIN IMMEDIATE`` transactions (pysqlite's own transaction handling lets two writers each read
and then overwrite, losing updates; an immediate write lock serialises them instead).
"""

from __future__ import annotations

import json
import os
import re
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from sqlalchemy import create_engine, event
from sqlalchemy.engine import Engine, make_url
from sqlalchemy.exc import (
    ArgumentError,
    DatabaseError,
    IntegrityError,
    NoSuchModuleError,
    OperationalError,
)
from sqlalchemy.orm import Session, sessionmaker

from ..config import BUSY_TIMEOUT_MS, DEFAULT_PATH, db_target
from ..errors import LedgerError, SchemaError

__all__ = ["DEFAULT_PATH", "resolve_url", "make_engine", "session_scope", "is_sqlite",
           "display_url", "scrub_secret", "driver_message"]


_USERINFO_RE = re.compile(r"(://[^:/@\s]*:)[^@\s]*@")
_PASSWORD_KV_RE = re.compile(r"(\bpassword\s*=\s*)('[^']*'|\"[^\"]*\"|[^\s'\"]+)", re.I)


def display_url(url: str | os.PathLike | None) -> str:
    """``url`` fit to print: the password replaced by ``***``.

    Every message, title and export that names a database goes through this one helper, so a
    password given in ``--db`` or ``$LOOPLEDGER_DB`` never reaches a screen, a log or a file.
    Text that does not parse as a URL has anything between ``scheme://user:`` and ``@``
    masked the same way.
    """
    if url is None:
        return ""
    text = os.fspath(url)
    if "://" not in text:
        return text
    try:
        u = make_url(text)
    except ArgumentError:
        return _USERINFO_RE.sub(r"\1***@", text)
    if u.password is None:
        return _USERINFO_RE.sub(r"\1***@", text)
    return u.render_as_string(hide_password=True)


def ledger_key(url: str | os.PathLike) -> str:
    """A stable name of a ledger for per-user settings (ledger/prefs.py): an SQLite file's
    resolved path, else the URL without its password."""
    from pathlib import Path

    try:
        u = make_url(str(url)) if "://" in str(url) else None
        if u is None:
            return "sqlite:" + str(Path(url).resolve())
        if u.drivername.startswith("sqlite") and u.database:
            return "sqlite:" + str(Path(u.database).resolve())
        return u.render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - a key is only a name; any text will do
        return str(url)


def scrub_secret(message: str, url: str | os.PathLike | None) -> str:
    """``message`` with the password of ``url`` (plain and URL-quoted) replaced by ``***``.

    Driver errors may echo the connection string or its parts; this removes the secret
    wherever it appears, and masks any other ``scheme://user:password@`` found in the text.
    """
    from urllib.parse import quote, quote_plus

    text = str(message)
    if url is not None and "://" in os.fspath(url):
        raw = os.fspath(url)
        text = text.replace(raw, display_url(raw))
        try:
            password = make_url(raw).password
        except ArgumentError:
            m = _USERINFO_RE.search(raw)
            password = m.group(0)[len(m.group(1)):-1] if m else None
        if password:
            # bare occurrences only for passwords long enough not to mangle ordinary words;
            # shorter ones are still masked in the URL and ``password=`` forms below
            for form in sorted({str(password), quote(str(password), safe=""),
                                quote_plus(str(password))}, key=len, reverse=True):
                if len(form) >= 4:
                    text = text.replace(form, "***")
    text = _PASSWORD_KV_RE.sub(_mask_kv, text)
    return _USERINFO_RE.sub(r"\1***@", text)


def _mask_kv(m: re.Match) -> str:
    value = m.group(2)
    tail = value[-1] if value[-1] in ":;," and value[0] not in "'\"" else ""
    return f"{m.group(1)}***{tail}"


def driver_message(e: BaseException, url: str | os.PathLike | None) -> str:
    """A driver's error text as one line, with the password of ``url`` scrubbed."""
    orig = getattr(e, "orig", None) or e
    return " ".join(scrub_secret(str(orig), url).split())


def resolve_url(target: str | os.PathLike | None = None) -> str:
    """Turn a path, a URL or ``None`` into a SQLAlchemy URL.

    ``None`` means ``$LOOPLEDGER_DB`` if set, else ``./loopledger.db``.  A plain path becomes an
    SQLite URL; anything with ``://`` is taken as a URL (e.g. ``postgresql+psycopg://...``).
    """
    if target is None:
        target = db_target()
    text = os.fspath(target)
    if "://" in text:
        try:
            make_url(text)
        except ArgumentError as e:
            raise SchemaError(f"not a database URL: {display_url(text)!r}") from e
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
        engine = _create(url)
        _install_sqlite_hooks(engine, wal=path is not None, immediate=immediate)
        if not foreign_keys:
            @event.listens_for(engine, "connect")
            def _fk_off(dbapi_conn, _record):
                dbapi_conn.execute("PRAGMA foreign_keys=OFF")
        return engine
    return _create(url, pool_pre_ping=True)


def _create(url: str, **kwargs) -> Engine:
    """``create_engine`` with an unknown scheme or a missing driver as a one-line error."""
    try:
        return create_engine(url, future=True, **kwargs)
    except NoSuchModuleError as e:
        raise SchemaError(f"{display_url(url)}: unknown database kind "
                          f"{make_url(url).drivername!r}; use an SQLite path or "
                          "postgresql+psycopg://...") from e
    except ImportError as e:
        raise SchemaError(f"{display_url(url)}: the database driver for "
                          f"{make_url(url).drivername!r} is not installed ({e.name or e}); "
                          "loopledger supports SQLite and PostgreSQL (postgresql+psycopg://)") from e
    except ArgumentError as e:
        raise SchemaError(f"{display_url(url)}: {scrub_secret(str(e), url)}") from e


@contextmanager
def session_scope(factory: sessionmaker, url: str | None = None) -> Iterator[Session]:
    """One transaction: commit on success, roll back on any exception.

    Database-level failures other than constraint violations (a damaged file, a lock held past
    the busy timeout, a lost server) become a one-line :class:`SchemaError`, with the password
    of ``url`` scrubbed from the driver's message.  A value the driver or SQLAlchemy cannot
    decode while reading rows (text that is not UTF-8, a damaged timestamp or number) means
    the stored bytes are damaged, and is reported as such.
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
        if "Could not decode to UTF-8" in str(e.orig):  # sqlite3: stored text is not UTF-8
            raise SchemaError(f"ledger damaged: a stored value cannot be read "
                              f"({driver_message(e, url)}); restore it from a backup") from e
        raise SchemaError(f"database error: {driver_message(e, url)}; "
                          "nothing was written") from e
    except DatabaseError as e:
        session.rollback()
        raise SchemaError(f"database damaged or not a ledger: "
                          f"{driver_message(e, url)}") from e
    except (ValueError, OverflowError) as e:
        session.rollback()
        if isinstance(e, LedgerError):
            raise
        if isinstance(e, json.JSONDecodeError):  # stored JSON fields are only written by us
            raise SchemaError(f"ledger damaged: a stored JSON field is not valid JSON "
                              f"({e.msg} at character {e.pos}); restore it from a backup") from e
        if not _raised_reading_rows(e):
            raise
        raise SchemaError(f"ledger damaged: a stored value cannot be read "
                          f"({type(e).__name__}: {_short_reason(e)}); restore it from a "
                          "backup") from e
    except BaseException:
        session.rollback()
        raise
    finally:
        session.close()


def _short_reason(e: BaseException) -> str:
    if isinstance(e, UnicodeDecodeError):
        return f"stored text is not UTF-8 at byte {e.start}"
    return str(e).splitlines()[0][:120] if str(e) else "unreadable"


def _raised_reading_rows(e: BaseException) -> bool:
    """True when ``e`` came out of SQLAlchemy or the driver turning stored bytes into values
    (the innermost Python frame belongs to SQLAlchemy), not out of loopledger's own code."""
    tb = e.__traceback__
    last = ""
    while tb is not None:  # compiled (Cython) frames carry their module's globals too
        last = str(tb.tb_frame.f_globals.get("__name__", ""))
        tb = tb.tb_next
    return last == "sqlalchemy" or last.startswith("sqlalchemy.")
