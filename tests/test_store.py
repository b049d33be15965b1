"""The store: schema made by migrations only, upgrade on open, append-only records, one
transaction per write, clear refusals with nothing written."""

from __future__ import annotations

import shutil
import sqlite3

import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import text

from ledger.api import open_ledger
from ledger.errors import (
    DuplicateError,
    IntegrityViolation,
    LedgerError,
    ModelError,
    ModelSyntaxError,
    NotFoundError,
    SchemaError,
    UnitError,
)
from ledger.store.db import make_engine
from ledger.store.migrate import head_revision
from ledger.store.models import Base

from pathlib import Path

FIXTURES = Path(__file__).parent / "fixtures"


def test_models_and_migrations_agree(lg):
    # Alembic's own comparison of the migrated schema with the models must find nothing.
    engine = make_engine(lg.url)
    with engine.connect() as conn:
        ctx = MigrationContext.configure(conn, opts={"compare_type": True,
                                                     "compare_server_default": True})
        diff = compare_metadata(ctx, Base.metadata)
    engine.dispose()
    assert diff == []


def test_new_ledger_is_at_head_with_pragmas(sqlite_lg):
    lg = sqlite_lg
    engine = make_engine(lg.url)
    with engine.connect() as conn:
        assert conn.execute(text("SELECT version_num FROM alembic_version")).scalar() == head_revision()
        assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
        assert conn.exec_driver_sql("PRAGMA busy_timeout").scalar() >= 5000
    engine.dispose()


def test_older_ledger_upgrades_on_open_with_backup(tmp_path):
    src = FIXTURES / "ledger-0001.db"
    path = tmp_path / "old.db"
    shutil.copy(src, path)
    lg = open_ledger(path)
    try:
        assert lg.schema_action == "upgraded from 0001"
        backups = list(tmp_path.glob("old.db.bak-0001-*"))
        assert len(backups) == 1
        # the backup is the old ledger, still at 0001
        with sqlite3.connect(backups[0]) as db:
            assert db.execute("SELECT version_num FROM alembic_version").fetchone()[0] == "0001"
        # every record intact and the API working on it
        assert [p.name for p in lg.plants()] == ["shaker"]
        assert lg.requirement("SH-1").limit_text == ">= 45 deg"
        assert lg.revision("shaker-speed", "r1").rationale.startswith("First PI tuning")
        r2 = lg.add_revision("shaker-speed", "pi(kp=0.1, ki=1.1)", rationale="faster")
        assert r2.parent == "r1"
    finally:
        lg.close()
    again = open_ledger(path)
    assert again.schema_action == "current"
    again.close()


def test_newer_schema_is_refused(tmp_path):
    path = tmp_path / "new.db"
    open_ledger(path, create=True).close()
    with sqlite3.connect(path) as db:
        db.execute("UPDATE alembic_version SET version_num = '9999'")
    with pytest.raises(SchemaError, match="'9999' is newer"):
        open_ledger(path)


@pytest.mark.parametrize("content", [b"", b"hello, this is not a database at all" * 100])
def test_not_a_ledger_is_refused(tmp_path, content):
    path = tmp_path / "junk.db"
    path.write_bytes(content)
    if content:
        with pytest.raises(SchemaError, match="not a ledger"):
            open_ledger(path)
    else:  # an empty file is an empty SQLite database: refused without --create
        with pytest.raises(SchemaError):
            open_ledger(path)


def test_foreign_sqlite_database_is_refused(tmp_path):
    path = tmp_path / "other.db"
    with sqlite3.connect(path) as db:
        db.execute("CREATE TABLE customers (id INTEGER)")
    with pytest.raises(SchemaError, match="not a ledger"):
        open_ledger(path)


def test_truncated_ledger_is_refused(tmp_path):
    path = tmp_path / "t.db"
    lg = open_ledger(path, create=True)
    lg.add_plant("p", "1/(s+1)")
    lg.close()
    with sqlite3.connect(path) as db:
        db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 3])
    with pytest.raises(SchemaError):
        lg = open_ledger(path)
        lg.plants()


def test_missing_ledger_file_is_an_error(tmp_path):
    with pytest.raises(SchemaError, match="no ledger at"):
        open_ledger(tmp_path / "absent.db")
    assert not (tmp_path / "absent.db").exists()


def test_requirement_edit_is_append_only(populated):
    lg = populated
    v2 = lg.edit_requirement("PZ-1", limit=">= 50 deg", note="tightened after review")
    assert v2.version == 2 and v2.limit_value == 50.0
    v1 = lg.requirement("PZ-1", version=1)
    assert v1.limit_value == 45.0 and v1.limit_text == ">= 45 deg"
    assert [h.version for h in lg.requirement_history("PZ-1")] == [1, 2]
    # an edit that changes nothing makes no version
    same = lg.edit_requirement("PZ-1", limit=">= 50 deg")
    assert same.version == 2
    # retire is a version too
    assert lg.retire_requirement("PZ-1", note="superseded").status == "retired"
    assert lg.requirement("PZ-1", version=2).status == "approved"


def test_plant_change_makes_a_new_version(populated):
    lg = populated
    p2 = lg.add_plant("pz", "K/(s*(tau_m*s+1))", params={"K": 200.0, "tau_m": 0.03})
    assert p2.version == 2
    assert lg.plant("pz", 1).params["K"] == {"nominal": 180.0, "tol": "10 %"}
    again = lg.add_plant("pz", "K/(s*(tau_m*s+1))", params={"K": 200.0, "tau_m": 0.03})
    assert again.version == 2


def test_revision_lineage_with_branches(populated):
    lg = populated
    lg.add_revision("pz", "pid(kp=0.5, ki=4, kd=0.006, tf=0.0008)", rationale="more gain")
    lg.add_revision("pz", "pid(kp=0.45, ki=5, kd=0.006, tf=0.0008)", rationale="branch: more ki",
                    parent="r1")
    tree = lg.lineage("pz")
    assert len(tree) == 1 and tree[0].revision.label == "r1"
    assert [c.revision.label for c in tree[0].children] == ["r2", "r3"]
    assert [r.label for r in lg.ancestry("pz", "r3")] == ["r3", "r1"]
    assert lg.revision("pz").label == "r3"  # tip = latest recorded
    root2 = lg.add_revision("pz", "pi(kp=0.3, ki=3)", rationale="new approach", parent=None)
    assert root2.parent is None and len(lg.lineage("pz")) == 2


def _counts(lg):
    return lg.counts()


@pytest.mark.parametrize(
    "call, exc, match",
    [
        (lambda lg: lg.add_revision("pz", "pid(kp=0.4, ki=4)", rationale="   "), IntegrityViolation, "rationale is required"),
        (lambda lg: lg.add_revision("pz", "pid(kp=0.4, ki=4", rationale="x"), ModelSyntaxError, "column"),
        (lambda lg: lg.add_revision("pz", "pid(kp=0.4, ki=4)", rationale="x", parent="r99"), NotFoundError, "no revision 'r99'"),
        (lambda lg: lg.add_revision("nope", "pid(kp=0.4, ki=4)", rationale="x"), NotFoundError, "no loop named 'nope'"),
        (lambda lg: lg.add_requirement("PZ-2", title="t", statement="s", metric="settling_time", limit="<= 30 parsecs"), UnitError, "unit"),
        (lambda lg: lg.add_requirement("PZ-2", title="t", statement="s", metric="settling_time", limit="<= 30 deg"), UnitError, "does not fit"),
        (lambda lg: lg.add_requirement("PZ-2", title="t", statement="s", metric="no_such_metric", limit="<= 3"), IntegrityViolation, "unknown metric"),
        (lambda lg: lg.add_requirement("PZ-2", title="t", statement="s", parents=["NOPE"]), NotFoundError, "NOPE"),
        (lambda lg: lg.add_requirement("PZ-1", title="t", statement="s"), DuplicateError, "exists"),
        (lambda lg: lg.edit_requirement("SYS-1", parents=["PZ-1"]), IntegrityViolation, "cycle"),
        (lambda lg: lg.add_plant("bad", "1/(s+1"), ModelSyntaxError, "column"),
        (lambda lg: lg.add_plant("bad", "K/(s+a)"), LedgerError, "a"),
        (lambda lg: lg.add_plant("bad", "1/(z-0.5)"), ModelError, "sample time"),
        (lambda lg: lg.add_loop("bad", "pz", sample_time=0.0), ModelError, "sample_time"),
        (lambda lg: lg.add_loop("bad", "pz", input_delay=-1e-3), ModelError, "input_delay"),
        (lambda lg: lg.add_loop("pz", "pz", kind="speed"), DuplicateError, "other settings"),
    ],
)
def test_bad_input_is_refused_and_nothing_written(populated, call, exc, match):
    before = _counts(populated)
    with pytest.raises(exc, match=match):
        call(populated)
    assert _counts(populated) == before


def test_write_is_one_transaction(populated, monkeypatch):
    """A failure in the middle of a multi-row write leaves nothing of it behind."""
    lg = populated
    before = _counts(lg)
    import ledger.store.requirements as R

    orig = R.write_version

    def boom(s, req, number, fields, author, note):
        orig(s, req, number, fields, author, note)  # rows written into the session...
        raise RuntimeError("simulated crash after the version row")

    monkeypatch.setattr(R, "write_version", boom)
    with pytest.raises(RuntimeError):
        lg.add_requirement("PZ-9", title="t", statement="s", parents=["SYS-1"], loops=["pz"])
    assert _counts(lg) == before


def test_rationale_check_constraint_in_database(populated):
    """Even raw SQL cannot record a revision without a rationale."""
    engine = make_engine(populated.url)
    with pytest.raises(Exception, match="(?i)check constraint"):
        with engine.begin() as conn:
            conn.execute(text(
                "INSERT INTO revision (loop_id, label, seq, parent_id, author, rationale, "
                "controller_text, controller_canonical, content_hash, created_at) VALUES "
                "(1, 'rx', 99, NULL, 'a', '  ', 'gain(1)', 'gain(1)', 'h', '2026-01-01')"))
    engine.dispose()


def test_unit_of_work_translates_a_refused_constraint_and_writes_nothing(populated):
    """A constraint the database refuses inside ``lg.store.write`` comes back as one
    IntegrityViolation naming the refusal, and the whole transaction (the plant added first
    in it, too) is rolled back.  The constraint is the schema's own CHECK on a revision's
    rationale (migrations/versions; common practice, no source)."""
    from ledger.store import plants as plants_db

    lg = populated
    before = _counts(lg)

    def work(s):
        plants_db.add(s, "extra", "1/(s+1)", author="t")
        s.execute(text(
            "INSERT INTO revision (loop_id, label, seq, parent_id, author, rationale, "
            "controller_text, controller_canonical, content_hash, created_at) VALUES "
            "(1, 'rx', 99, NULL, 'a', '  ', 'gain(1)', 'gain(1)', 'h', '2026-01-01')"))

    with pytest.raises(IntegrityViolation, match="(?i)database refused the change: .*check"):
        lg.store.write(work)
    assert _counts(lg) == before
    with pytest.raises(NotFoundError):
        lg.plant("extra")
