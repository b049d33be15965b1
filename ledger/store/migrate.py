"""Schema management through Alembic, configured in code (no alembic.ini needed at run time).

Opening a ledger checks its Alembic revision against the head of ``migrations/``: a new file is
migrated from nothing, an older one is upgraded (an SQLite file is first copied to a backup
beside it), a newer one is refused with the version named, and a database that is not a ledger
is refused.  Migrations run with foreign keys OFF on a separate engine (a batch migration
recreates tables, and with foreign keys on, cascades could delete child rows); a foreign-key
check runs afterwards.
"""

from __future__ import annotations

import re
from datetime import datetime, timezone
from functools import lru_cache
from pathlib import Path

from sqlalchemy import inspect, text
from sqlalchemy.exc import DatabaseError, OperationalError

from ..errors import SchemaError
from .db import display_url, driver_message, make_engine, sqlite_path

__all__ = ["migrations_dir", "alembic_config", "head_revision", "current_revision", "ensure_schema"]


def migrations_dir() -> Path:
    """Folder of the Alembic scripts: shipped in the wheel as ``ledger/_migrations``, or the
    repository's top-level ``migrations/`` in a source checkout."""
    here = Path(__file__).resolve().parent.parent
    for candidate in (here / "_migrations", here.parent / "migrations"):
        if (candidate / "env.py").is_file():
            return candidate
    raise SchemaError("migration scripts not found; reinstall loopledger")


def alembic_config(url: str):
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(migrations_dir()))
    cfg.set_main_option("sqlalchemy.url", url.replace("%", "%%"))
    return cfg


_REV_RE = re.compile(r"^revision\s*=\s*['\"]([^'\"]+)['\"]", re.M)
_DOWN_RE = re.compile(r"^down_revision\s*=\s*(?:None|['\"]([^'\"]+)['\"])", re.M)


@lru_cache(maxsize=1)
def _revision_graph() -> dict[str, str | None]:
    """revision -> down_revision, read from the scripts' text.

    Opening a ledger that is already current must not pay for importing Alembic (about a
    tenth of a second); the scripts' two header assignments are all the head check needs.
    Alembic itself runs only for an actual upgrade, and a test checks both agree.
    """
    graph: dict[str, str | None] = {}
    for path in sorted((migrations_dir() / "versions").glob("*.py")):
        text_ = path.read_text(encoding="utf-8")
        rev, down = _REV_RE.search(text_), _DOWN_RE.search(text_)
        if rev is None or down is None:
            raise SchemaError(f"migration script {path.name} has no revision header")
        graph[rev.group(1)] = down.group(1)
    return graph


def head_revision() -> str:
    graph = _revision_graph()
    heads = set(graph) - {d for d in graph.values() if d}
    if len(heads) != 1:
        raise SchemaError(f"migration scripts have {len(heads)} heads; expected one")
    return heads.pop()


def known_revisions() -> set[str]:
    return set(_revision_graph())


def current_revision(conn) -> str | None:
    rows = conn.execute(text("SELECT version_num FROM alembic_version")).fetchall()
    if len(rows) > 1:
        raise SchemaError("ledger has more than one schema version recorded")
    return rows[0][0] if rows else None


def _check_is_ledger(url: str) -> str | None:
    """Return the current revision (None for an empty database); raise if not a ledger.

    Nothing is written: an SQLite file is read through a read-only connection (no journal
    mode switch, no file created), so a file that is then refused is left byte for byte as
    it was.
    """
    path = sqlite_path(url)
    if path is not None:
        return _check_sqlite_file(path)
    shown = display_url(url)
    engine = make_engine(url)
    try:
        with engine.connect() as conn:
            try:
                tables = set(inspect(conn).get_table_names())
            except DatabaseError as e:
                raise SchemaError(f"{shown}: not a ledger database "
                                  f"({driver_message(e, url)})") from e
            return _revision_of(conn, tables, shown)
    except OperationalError as e:
        raise SchemaError(f"cannot open {shown}: {driver_message(e, url)}") from e
    except DatabaseError as e:
        raise SchemaError(f"{shown}: not a ledger database or damaged "
                          f"({driver_message(e, url)})") from e
    finally:
        engine.dispose()


def _revision_of(conn, tables: set[str], shown: str) -> str | None:
    if not tables:
        return None
    if "alembic_version" not in tables:
        raise SchemaError(f"{shown}: has tables but no ledger schema version; not a ledger database")
    rev = current_revision(conn)
    if rev is None:
        raise SchemaError(f"{shown}: ledger schema version is missing")
    return rev


_SQLITE_MAGIC = b"SQLite format 3\x00"


def _check_not_truncated(path: Path, header: bytes, wal_file: Path) -> None:
    """Refuse a file shorter than its own header says (SQLite reads the missing pages as
    zeros, so a truncated file would otherwise fail only on the command that reads them).
    The header's page count is used only when valid (its version-valid-for number equals the
    change counter) and no ``-wal`` file may hold newer pages."""
    if wal_file.exists() or header[92:96] != header[24:28]:
        return
    page = int.from_bytes(header[16:18], "big")
    page = 65536 if page == 1 else page
    pages = int.from_bytes(header[28:32], "big")
    size = path.stat().st_size
    if pages and size < pages * page:
        raise SchemaError(f"{path}: ledger file damaged: truncated ({size} bytes, its header "
                          f"says {pages} pages of {page} bytes)")


def _check_sqlite_file(path: Path) -> str | None:
    """:func:`_check_is_ledger` for an SQLite file, read-only.

    The 100-byte header is read first: an empty file is an empty database, anything else
    without the SQLite signature is refused unopened.  A file in WAL mode with no ``-wal``
    beside it is opened ``immutable`` (no ``-wal``/``-shm`` is created); otherwise
    ``mode=ro``, which never creates the file nor changes its journal mode.
    """
    import sqlite3
    from urllib.parse import quote

    if not path.exists():
        return None
    if path.is_dir():
        raise SchemaError(f"{path}: is a folder, not a ledger file")
    try:
        with open(path, "rb") as fh:
            header = fh.read(100)
    except OSError as e:
        raise SchemaError(f"cannot read {path}: {e.strerror or e}") from e
    if not header:
        return None
    if len(header) < 100 or not header.startswith(_SQLITE_MAGIC):
        raise SchemaError(f"{path}: not an SQLite database (no SQLite header); not a ledger file")
    page = int.from_bytes(header[16:18], "big")
    page = 65536 if page == 1 else page
    if page and path.stat().st_size % page:
        # an SQLite file is whole pages; a part page is a cut file (pages no query touches
        # would otherwise go unnoticed)
        raise SchemaError(f"{path}: not a ledger database or damaged (its size is not a whole "
                          f"number of {page}-byte pages: the file was cut short)")
    wal_mode = header[18] == 2 or header[19] == 2
    wal_file = path.with_name(path.name + "-wal")
    _check_not_truncated(path, header, wal_file)
    mode = "immutable=1" if wal_mode and not wal_file.exists() else "mode=ro"
    uri = f"file:{quote(str(path))}?{mode}"
    conn = None
    try:
        conn = sqlite3.connect(uri, uri=True, isolation_level=None)
        tables = {r[0] for r in conn.execute(
            "SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'")}
        return _revision_of(_RawConn(conn), tables, str(path))
    except sqlite3.OperationalError as e:
        raise SchemaError(f"cannot open {path}: {e}") from e
    except sqlite3.DatabaseError as e:
        raise SchemaError(f"{path}: not a ledger database or damaged ({e})") from e
    except (ValueError, UnicodeDecodeError) as e:
        raise SchemaError(f"{path}: ledger file damaged: its schema version is unreadable "
                          f"({type(e).__name__})") from e
    finally:
        if conn is not None:
            conn.close()


class _RawConn:
    """Just enough of a SQLAlchemy connection for :func:`current_revision` over sqlite3."""

    def __init__(self, conn):
        self._conn = conn

    def execute(self, clause):
        return self._conn.execute(str(clause))


def _upgrade(url: str, target: str = "head") -> None:
    from alembic import command

    engine = make_engine(url, foreign_keys=False)
    try:
        with engine.begin() as conn:
            cfg = alembic_config(url)
            cfg.attributes["connection"] = conn
            command.upgrade(cfg, target)
        if sqlite_path(url) is not None or url.startswith("sqlite"):
            with engine.connect() as conn:
                bad = conn.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
                if bad:
                    raise SchemaError(f"foreign-key check failed after migration: {bad[:3]}")
    finally:
        engine.dispose()


def _backup_sqlite(src: Path, dst: Path) -> None:
    """Consistent copy of a live SQLite file (WAL included) through SQLite's backup API."""
    import sqlite3

    with sqlite3.connect(src) as s, sqlite3.connect(dst) as d:
        s.backup(d)
    s.close()
    d.close()


def ensure_schema(url: str, *, create: bool) -> str:
    """Bring the database at ``url`` to the head schema; return what was done.

    Returns one of ``"current"``, ``"created"``, ``"upgraded from <rev>"``.
    """
    path = sqlite_path(url)
    if path is not None and not path.exists():
        if not create:
            raise SchemaError(f"no ledger at {path}; create one with 'loopledger init {path}'")
        path.parent.mkdir(parents=True, exist_ok=True)
    rev = _check_is_ledger(url)
    head = head_revision()
    if rev == head:
        return "current"
    if rev is None:
        if not create:
            raise SchemaError(f"{display_url(url)}: empty database, not a ledger; "
                              "create one with 'loopledger init'")
        _upgrade(url)
        return "created"
    if rev not in known_revisions():
        raise SchemaError(
            f"ledger schema version {rev!r} is newer than this loopledger knows (head {head!r}); "
            "upgrade loopledger"
        )
    if path is not None:
        stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%S")
        backup = path.with_name(f"{path.name}.bak-{rev}-{stamp}")
        _backup_sqlite(path, backup)
    _upgrade(url)
    return f"upgraded from {rev}"
