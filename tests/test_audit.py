"""The audit names every record altered, deleted or written behind the ledger's back, every
chain link altered, and every sign-off that no longer matches its baseline.  Tampering is done
with plain SQL, as someone with write access to the database file could."""

from __future__ import annotations

import hashlib
import threading

import pytest
from sqlalchemy import text
from typer.testing import CliRunner

from ledger.api import open_ledger
from ledger.audit import audit
from ledger.chain import GENESIS
from ledger.signoff import create_baseline, sign_baseline
from ledger.store.db import is_sqlite, make_engine


def build(lg):
    """Plant 1/(s(s+1)), a derived requirement, two revisions, a signed baseline."""
    lg.add_plant("p", "1/(s*(s+1))")
    lg.add_loop("x", "p")
    lg.add_requirement("SYS-1", title="Moves", statement="Moves settle.")
    lg.add_requirement("X-1", title="Phase margin", statement="PM at least 20 deg.",
                       metric="phase_margin", limit=">= 20 deg", loops=["x"], parents=["SYS-1"],
                       status="approved")
    lg.add_revision("x", "4", rationale="proportional gain")
    lg.add_revision("x", "3", rationale="less gain for margin")
    create_baseline(lg, "B1")
    sign_baseline(lg, "B1", signer="A. Reviewer", role="lead", statement="approved")
    return lg


def sql(lg, *statements: str, fk_off: bool = False) -> None:
    """Run raw SQL on the ledger's database outside the API (optionally without foreign keys)."""
    engine = make_engine(lg.url, foreign_keys=not fk_off)
    with engine.begin() as conn:
        if fk_off and not is_sqlite(lg.url):
            conn.execute(text("SET LOCAL session_replication_role = replica"))
        for st in statements:
            conn.execute(text(st))
    engine.dispose()


def rows(lg, statement: str):
    engine = make_engine(lg.url)
    with engine.connect() as conn:
        out = conn.execute(text(statement)).all()
    engine.dispose()
    return out


def found(rep, problem, kind=None):
    return [(f.kind, f.record_id) for f in rep.named(problem, kind)]


def test_untouched_ledger_passes_and_chain_follows_the_rule(lg):
    build(lg)
    rep = audit(lg)
    assert rep.ok, rep.findings
    assert rep.records == {"revision": 2, "requirement_version": 2, "baseline": 1, "signoff": 1}
    assert rep.links == 6
    prev = GENESIS
    links = rows(lg, "SELECT seq, kind, record_id, record_hash, prev_hash, chain_hash "
                     "FROM chain_link ORDER BY seq")
    for seq, kind, rid, rh, ph, ch in links:
        # Source: chain rule of docs/signoff.md, SHA-256 from Python's hashlib (FIPS 180-4)
        assert ph == prev
        assert ch == hashlib.sha256(f"{ph}:{kind}:{rid}:{rh}".encode()).hexdigest()
        prev = ch
    assert rep.head == prev
    assert [k for _, k, *_ in links] == ["requirement_version", "requirement_version", "revision",
                                          "revision", "baseline", "signoff"]


def test_revision_edited_by_sql_is_named(lg):
    build(lg)
    (rid,) = rows(lg, "SELECT id FROM revision WHERE label = 'r1'")[0]
    sql(lg, f"UPDATE revision SET rationale = 'rewritten afterwards' WHERE id = {rid}")
    rep = audit(lg)
    assert found(rep, "record altered") == [("revision", rid)]
    assert len(rep.findings) == 1


def test_requirement_version_deleted_is_named(lg):
    build(lg)
    (vid,) = rows(lg, "SELECT v.id FROM requirement_version v JOIN requirement r "
                      "ON v.requirement_id = r.id WHERE r.key = 'SYS-1'")[0]
    sql(lg, f"DELETE FROM requirement_version WHERE id = {vid}", fk_off=True)
    rep = audit(lg)
    assert found(rep, "record deleted") == [("requirement_version", vid)]
    assert len(rep.findings) == 1


def test_trace_and_loop_rows_belong_to_the_requirement_version(lg):
    build(lg)
    (vid,) = rows(lg, "SELECT v.id FROM requirement_version v JOIN requirement r "
                      "ON v.requirement_id = r.id WHERE r.key = 'X-1'")[0]
    sql(lg, f"DELETE FROM requirement_parent WHERE version_id = {vid}")
    rep = audit(lg)
    assert found(rep, "record altered") == [("requirement_version", vid)]


def test_signoff_altered_is_named(lg):
    build(lg)
    (sid,) = rows(lg, "SELECT id FROM signoff")[0]
    sql(lg, f"UPDATE signoff SET role = 'director' WHERE id = {sid}")
    rep = audit(lg)
    assert found(rep, "record altered") == [("signoff", sid)]
    assert not rep.named("sign-off mismatch")
    # binding the sign-off to another matrix is named twice: content and matrix
    sql(lg, f"UPDATE signoff SET matrix_hash = '{'ab' * 32}' WHERE id = {sid}")
    rep = audit(lg)
    assert found(rep, "record altered") == [("signoff", sid)]
    assert found(rep, "sign-off mismatch") == [("signoff", sid)]


def test_frozen_baseline_entry_altered_is_named(lg):
    build(lg)
    (bid,) = rows(lg, "SELECT id FROM baseline")[0]
    sql(lg, "UPDATE baseline_entry SET data_json = replace(data_json, '\"pass\"', '\"fail\"') "
            "WHERE kind = 'cell'")
    rep = audit(lg)
    assert found(rep, "record altered") == [("baseline", bid)]
    assert found(rep, "baseline altered") == [("baseline", bid)]
    assert len(found(rep, "sign-off mismatch")) == 1


def test_chain_link_altered_is_named(lg):
    build(lg)
    for column in ("record_hash", "chain_hash", "kind", "record_id"):
        (old,) = rows(lg, f"SELECT {column} FROM chain_link WHERE seq = 3")[0]
        value = {"kind": "'requirement_version'", "record_id": "77"}.get(column, f"'{'0f' * 32}'")
        sql(lg, f"UPDATE chain_link SET {column} = {value} WHERE seq = 3")
        rep = audit(lg)
        assert ("chain_link", 3) in found(rep, "link altered"), column
        old_sql = old if column == "record_id" else f"'{old}'"
        sql(lg, f"UPDATE chain_link SET {column} = {old_sql} WHERE seq = 3")
        assert audit(lg).ok, column


def test_link_removed_and_row_inserted_behind_the_back(lg):
    build(lg)
    sql(lg, "DELETE FROM chain_link WHERE seq = 4")  # the link of revision r2
    sql(lg, "INSERT INTO revision (id, loop_id, label, seq, parent_id, author, rationale, "
            "controller_text, controller_canonical, content_hash, created_at) "
            "SELECT 99, loop_id, 'r9', 9, NULL, 'someone', 'slipped in', '5', '5', 'x', created_at "
            "FROM revision WHERE label = 'r1'")
    rep = audit(lg)
    assert ("chain_link", 5) in found(rep, "link altered")  # sequence gap and broken prev hash
    (r2,) = rows(lg, "SELECT id FROM revision WHERE label = 'r2'")[0]
    assert sorted(found(rep, "record unlinked")) == [("revision", r2), ("revision", 99)]


def test_cli_audit_exit_status(lg, monkeypatch):
    from ledger.cli import app

    build(lg)
    monkeypatch.setenv("LOOPLEDGER_DB", lg.url)
    runner = CliRunner()
    res = runner.invoke(app, ["audit"])
    assert res.exit_code == 0, res.output
    assert "ledger intact" in res.output
    sql(lg, "UPDATE revision SET rationale = 'changed' WHERE label = 'r2'")
    res = runner.invoke(app, ["audit", "--json"])
    assert res.exit_code == 1
    assert '"problem": "record altered"' in res.output and '"ok": false' in res.output


def test_concurrent_writers_keep_one_chain(db_url):
    # two ledger objects (two connections pools) appending at once must not fork the chain
    a = open_ledger(db_url, create=True, author="a")
    b = open_ledger(db_url, author="b")
    try:
        a.add_plant("p", "1/(s*(s+1))")
        a.add_loop("x", "p")
        a.add_loop("y", "p")
        errors = []

        def work(lg, loop):
            try:
                for i in range(6):
                    lg.add_revision(loop, f"{i + 1}", rationale=f"gain {i + 1}", verify=False)
            except Exception as e:  # noqa: BLE001 - reported by the assert below
                errors.append(e)

        threads = [threading.Thread(target=work, args=(a, "x")),
                   threading.Thread(target=work, args=(b, "y"))]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert errors == []
        rep = audit(a)
        assert rep.ok, rep.findings
        assert rep.links == 12
    finally:
        a.close()
        b.close()
