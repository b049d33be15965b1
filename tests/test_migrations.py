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


def test_upgrade_from_0004_relinks_the_chain_a_signoff_points_into(tmp_path, monkeypatch):
    """The 0004 fixture holds a baseline and a sign-off made by the loopledger of schema 0004;
    0005 puts link time stamps inside the link hash, so it re-links the chain and moves the
    sign-off's recorded head to the re-linked hash of the same link."""
    import sqlite3

    from ledger.audit import audit
    from ledger.signoff import create_baseline, sign_baseline

    path = tmp_path / "old-0004.db"
    shutil.copy(FIXTURES / "ledger-0004.db", path)
    with sqlite3.connect(path) as db:
        (old_head,) = db.execute("SELECT chain_head FROM signoff").fetchone()
        (head_seq,) = db.execute("SELECT seq FROM chain_link WHERE chain_hash = ?",
                                 (old_head,)).fetchone()
    lg = open_ledger(path, author="tester")
    try:
        assert lg.schema_action == "upgraded from 0004"
        rep = audit(lg)
        assert rep.ok, rep.findings
        assert rep.records["result"] == 3 and rep.records["result_batch"] == 2
        assert rep.records["signoff"] == 1 and rep.records["metric_value"] == 1
        with sqlite3.connect(path) as db:
            (new_head,) = db.execute("SELECT chain_head FROM signoff").fetchone()
            (seq,) = db.execute("SELECT seq FROM chain_link WHERE chain_hash = ?",
                                (new_head,)).fetchone()
        assert new_head != old_head and seq == head_seq
        # under today's engine the fixture's results (engine-1) are stale: no sign-off
        from ledger.errors import IntegrityViolation

        with pytest.raises(IntegrityViolation, match="stale"):
            sign_baseline(lg, "B-0004", signer="B", role="reviewer", statement="still agreed")
        # with the engine that computed them they are current: the content hashes the old
        # baseline froze recompute, and a new sign-off goes through
        import ledger.engine.results as engine_results

        monkeypatch.setattr(engine_results, "ENGINE_VERSION", "engine-1")
        sign_baseline(lg, "B-0004", signer="B", role="reviewer", statement="still agreed")
        create_baseline(lg, "B-0005", supersedes="B-0004")
        sign_baseline(lg, "B-0005", signer="B", role="reviewer", statement="agreed")
        assert audit(lg).ok
    finally:
        lg.close()


def test_upgrade_keeps_a_record_altered_before_it_named(tmp_path):
    """Record hashes already in links are kept by 0005: tampering done before the upgrade is
    still named after it (the upgrade does not launder it)."""
    import sqlite3

    from ledger.audit import audit

    path = tmp_path / "old-0004.db"
    shutil.copy(FIXTURES / "ledger-0004.db", path)
    with sqlite3.connect(path) as db:
        db.execute("UPDATE revision SET rationale = 'tidied before the upgrade' WHERE id = 1")
    db.close()
    lg = open_ledger(path)
    try:
        rep = audit(lg)
        assert [(f.problem, f.kind, f.record_id) for f in rep.findings] == [
            ("record altered", "revision", 1)]
    finally:
        lg.close()


def test_upgrade_drops_cache_rows_no_result_was_judged_from(tmp_path):
    """Before 0005 two writers racing on one revision could leave a cached metric value no
    result names; 0005 drops such rows (a cache: recomputed when needed) so the upgraded
    ledger audits clean, and keeps every row a result was judged from."""
    import sqlite3

    from ledger.audit import audit

    path = tmp_path / "old-0004.db"
    shutil.copy(FIXTURES / "ledger-0004.db", path)
    with sqlite3.connect(path) as db:
        db.execute("INSERT INTO metric_value (key, metric, values_json, engine_version, "
                   "created_at) VALUES ('orphan', 'phase_margin', '{}', 'engine-1', "
                   "'2026-11-02 09:15:00.000000')")
    db.close()
    lg = open_ledger(path)
    try:
        rep = audit(lg)
        assert rep.ok, rep.findings
        assert rep.records["metric_value"] == 1
    finally:
        lg.close()
    with sqlite3.connect(path) as db:
        assert db.execute("SELECT key FROM metric_value").fetchall() == [("k1",)]
    db.close()
