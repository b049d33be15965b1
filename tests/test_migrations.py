"""Every schema revision: fixture ledgers upgrade to head with records intact and the API
working; downgrade to the base and back up again on both back ends; models and migrations
agree after the round trip."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory

from ledger.api import open_ledger
from ledger.store.db import make_engine
from ledger.store.migrate import alembic_config, head_revision
from ledger.store.models import Base

FIXTURES = Path(__file__).parent / "fixtures"


def _revisions() -> list[str]:
    script = ScriptDirectory.from_config(alembic_config("sqlite://"))
    return [r.revision for r in reversed(list(script.walk_revisions()))]


def test_every_past_schema_has_a_fixture_ledger():
    revs = _revisions()
    assert revs[-1] == head_revision()
    for rev in revs[:-1]:
        assert (FIXTURES / f"ledger-{rev}.db").is_file(), (
            f"no fixture ledger for schema {rev}: run tests/fixtures/make_ledger_fixtures.py")


@pytest.mark.parametrize("rev", _revisions()[:-1])
def test_fixture_upgrades_to_head_with_records_intact(tmp_path, rev):
    path = tmp_path / f"old-{rev}.db"
    shutil.copy(FIXTURES / f"ledger-{rev}.db", path)
    import sqlite3

    with sqlite3.connect(path) as db:
        counts = {t: db.execute(f"SELECT COUNT(*) FROM {t}").fetchone()[0]
                  for t in ("plant", "plant_version", "loop", "revision", "requirement",
                            "requirement_version")}
    lg = open_ledger(path)
    try:
        assert lg.schema_action == f"upgraded from {rev}"
        after = lg.counts()
        for t, n in counts.items():
            assert after[t] == n, t
        from ledger.audit import audit

        assert audit(lg).ok  # the chain covers the upgraded records (backfilled by 0003)
        loop = lg.loops()[0].name
        tip = lg.revision(loop)
        new = lg.add_revision(loop, tip.controller, rationale="same controller after upgrade")
        assert new.parent == tip.label
    finally:
        lg.close()


def test_downgrade_to_base_and_back(db_url):
    lg = open_ledger(db_url, create=True)
    lg.close()
    url = lg.url
    engine = make_engine(url, foreign_keys=False)
    cfg = alembic_config(url)
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.downgrade(cfg, "base")
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, "head")
    with engine.connect() as conn:
        ctx = MigrationContext.configure(conn, opts={"compare_type": True,
                                                     "compare_server_default": True})
        assert compare_metadata(ctx, Base.metadata) == []
    engine.dispose()
    lg = open_ledger(url)
    assert lg.schema_action == "current"
    lg.close()


def test_light_head_check_agrees_with_alembic():
    # Reference: Alembic's own script directory (the light reader parses the headers only).
    from alembic.script import ScriptDirectory

    from ledger.store.migrate import known_revisions

    script = ScriptDirectory.from_config(alembic_config("sqlite://"))
    assert head_revision() == script.get_current_head()
    assert known_revisions() == {r.revision for r in script.walk_revisions()}
