"""The audit names every record altered, deleted or written behind the ledger's back, every
chain link altered, and every sign-off that no longer matches its baseline: plants, plant
versions, loops, requirements, requirement versions, revisions, results (with the metric
values they were judged from), result batches, baselines, sign-offs and chain links (time
stamps included).  Tampering is done with plain SQL, as someone with write access to the
database file could; each case runs on SQLite and PostgreSQL (the ``lg`` fixture)."""

from __future__ import annotations

import hashlib
import math
import json
import threading
from datetime import datetime, timezone

import pytest
from sqlalchemy import text
from typer.testing import CliRunner

from ledger.api import open_ledger
from ledger.audit import audit
from ledger.chain import GENESIS, result_row_hash
from ledger.signoff import create_baseline, sign_baseline
from ledger.store.db import is_sqlite, make_engine


def build(lg):
    """Plant 1/(s(s+1)), two derived requirements, two revisions (two results each, in one
    batch per revision), a signed baseline."""
    lg.add_plant("p", "1/(s*(s+1))")
    lg.add_loop("x", "p")
    lg.add_requirement("SYS-1", title="Moves", statement="Moves settle.")
    lg.add_requirement("X-1", title="Phase margin", statement="PM at least 20 deg.",
                       metric="phase_margin", limit=">= 20 deg", loops=["x"], parents=["SYS-1"],
                       status="approved")
    lg.add_requirement("X-2", title="Crossover", statement="Crossover at least 1 rad/s.",
                       metric="gain_crossover", limit=">= 1 rad/s", loops=["x"],
                       parents=["SYS-1"], status="approved")
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


def one(lg, statement: str):
    return rows(lg, statement)[0][0]


def stamp_of(value) -> str:
    """A time stamp as the documented hash rule writes it (UTC, microseconds), from what the
    driver returns (a string on SQLite, a datetime on PostgreSQL)."""
    if isinstance(value, str):
        value = datetime.fromisoformat(value)
    if value.tzinfo is not None:
        value = value.astimezone(timezone.utc).replace(tzinfo=None)
    return value.isoformat(sep=" ", timespec="microseconds")


def test_untouched_ledger_passes_and_chain_follows_the_rule(lg):
    build(lg)
    rep = audit(lg)
    assert rep.ok, rep.findings
    assert rep.records == {"plant": 1, "plant_version": 1, "loop": 1, "requirement": 3,
                           "requirement_version": 3, "revision": 2, "result_batch": 2,
                           "baseline": 1, "signoff": 1, "loop_spectrum": 0, "waiver": 0,
                           "waiver_withdrawal": 0, "result": 4, "metric_value": 4}
    assert rep.links == 15
    prev = GENESIS
    links = rows(lg, "SELECT seq, kind, record_id, record_hash, prev_hash, chain_hash, "
                     "created_at FROM chain_link ORDER BY seq")
    for seq, kind, rid, rh, ph, ch, at in links:
        # Source: chain rule of docs/signoff.md, SHA-256 from Python's hashlib (FIPS 180-4)
        assert ph == prev
        assert ch == hashlib.sha256(f"{ph}:{kind}:{rid}:{rh}:{stamp_of(at)}".encode()).hexdigest()
        prev = ch
    assert rep.head == prev
    assert [k for _, k, *_ in links] == [
        "plant", "plant_version", "loop", "requirement", "requirement_version",
        "requirement", "requirement_version", "requirement", "requirement_version",
        "revision", "result_batch", "revision", "result_batch", "baseline", "signoff"]


def test_result_row_hash_follows_the_documented_rule(lg):
    build(lg)
    cols = ("revision_id", "requirement_version_id", "plant_version_id", "verdict", "value",
            "headroom", "headroom_fraction", "worst_variant", "pass_fraction", "variants",
            "reason", "metric_key", "engine_version", "created_at")
    got = rows(lg, f"SELECT {', '.join(cols)}, row_hash FROM result ORDER BY id")
    assert len(got) == 4
    for r in got:
        vals = list(r[:-1])
        for i in (4, 5, 6, 8):
            vals[i] = None if vals[i] is None else float(vals[i])
        vals[-1] = stamp_of(vals[-1])
        # Source: result rule of docs/signoff.md (compact JSON list), SHA-256 from hashlib
        expect = hashlib.sha256(json.dumps(vals, separators=(",", ":"),
                                           ensure_ascii=False).encode()).hexdigest()
        assert r[-1] == expect


# -- edits: one UPDATE per record kind, each named as altered ---------------------------------
EDITS = {
    "plant": "UPDATE plant SET description = 'renamed' WHERE name = 'p'",
    "plant_version": "UPDATE plant_version SET model_text = '2/(s*(s+1))'",
    "plant_version_params": "UPDATE plant_version SET parameters_json = '{\"K\": 2}'",
    "loop": "UPDATE loop SET input_delay = 0.5 WHERE name = 'x'",
    "requirement": "UPDATE requirement SET key = 'X-9' WHERE key = 'X-1'",
    "requirement_version": "UPDATE requirement_version SET limit_value = 1.0, "
                           "limit_text = '>= 1 deg' WHERE title = 'Phase margin'",
    "revision": "UPDATE revision SET rationale = 'rewritten afterwards' WHERE label = 'r1'",
    "revision_parent": "UPDATE revision SET parent_id = NULL WHERE label = 'r2'",
    "result_batch": "UPDATE result_batch SET subjects = '' WHERE id = (SELECT min(id) FROM "
                    "result_batch)",
    "baseline": "UPDATE baseline SET note = 'edited'",
    "signoff": "UPDATE signoff SET role = 'director'",
}
KIND_OF = {"plant_version_params": "plant_version", "revision_parent": "revision"}
TABLE_OF = {"plant_version_params": "plant_version", "revision_parent": "revision"}
WHERE_OF = {"plant": "name = 'p'", "loop": "name = 'x'", "requirement": "key = 'X-9'",
            "requirement_version": "title = 'Phase margin'", "revision": "label = 'r1'",
            "revision_parent": "label = 'r2'",
            "result_batch": "id = (SELECT min(id) FROM result_batch)"}


@pytest.mark.parametrize("case", sorted(EDITS))
def test_chained_record_edited_by_sql_is_named(lg, case):
    build(lg)
    kind = KIND_OF.get(case, case)
    table = TABLE_OF.get(case, case)
    sql(lg, EDITS[case])
    rid = one(lg, f"SELECT id FROM {table} WHERE {WHERE_OF.get(case, '1 = 1')}")
    rep = audit(lg)
    assert (kind, rid) in found(rep, "record altered"), rep.findings
    f = rep.named("record altered", kind)[0]
    assert f.label  # named as a person names it


def test_results_edited_to_pass_are_named_with_their_subject(lg):
    build(lg)
    rid = one(lg, "SELECT r.id FROM result r JOIN revision v ON v.id = r.revision_id "
                  "JOIN requirement_version q ON q.id = r.requirement_version_id "
                  "WHERE v.label = 'r2' AND q.title = 'Phase margin'")
    sql(lg, f"UPDATE result SET verdict = 'fail', value = 2.5, headroom = -17.5 WHERE id = {rid}")
    rep = audit(lg)
    assert found(rep, "record altered") == [("result", rid)]
    assert rep.findings[0].label == "x/r2 X-1 v1 on p v1"
    assert len(rep.findings) == 1


def test_result_rewritten_with_a_recomputed_row_hash_is_named_by_its_batch(lg):
    build(lg)
    (rid, bid) = rows(lg, "SELECT id, batch_id FROM result ORDER BY id")[0]
    sql(lg, f"UPDATE result SET value = value + 1 WHERE id = {rid}")
    engine = make_engine(lg.url)
    with engine.connect() as conn:
        row = conn.execute(text(f"SELECT * FROM result WHERE id = {rid}")).mappings().one()
        # the driver's own types, as the ledger reads them
        from sqlalchemy import select
        from ledger.store.models import Result
        row = conn.execute(select(Result.__table__).where(Result.__table__.c.id == rid)
                           ).mappings().one()
    engine.dispose()
    sql(lg, f"UPDATE result SET row_hash = '{result_row_hash(row)}' WHERE id = {rid}")
    rep = audit(lg)
    assert found(rep, "record altered") == [("result_batch", bid)]


def test_metric_value_edited_is_named_and_rehashed_one_breaks_its_batches(lg):
    build(lg)
    key = one(lg, "SELECT metric_key FROM result ORDER BY id")
    sql(lg, f"UPDATE metric_value SET values_json = replace(values_json, '.', '1.') "
            f"WHERE key = '{key}'")
    rep = audit(lg)
    assert found(rep, "record altered") == [("metric_value", key)]
    # a rewrite with a recomputed row hash is named through the batch that used the value
    from ledger.chain import metric_row_hash
    from ledger.store.models import MetricValue
    from sqlalchemy import select

    engine = make_engine(lg.url)
    with engine.connect() as conn:
        row = conn.execute(select(MetricValue.__table__).where(
            MetricValue.__table__.c.key == key)).mappings().one()
    engine.dispose()
    sql(lg, f"UPDATE metric_value SET row_hash = '{metric_row_hash(row)}' WHERE key = '{key}'")
    bid = one(lg, f"SELECT batch_id FROM result WHERE metric_key = '{key}'")
    rep = audit(lg)
    assert found(rep, "record altered") == [("result_batch", bid)]


def test_result_repointed_to_another_revision_is_named(lg):
    build(lg)
    lg.add_revision("x", "2", rationale="unverified", verify=False)
    r3 = one(lg, "SELECT id FROM revision WHERE label = 'r3'")
    rid = one(lg, "SELECT r.id FROM result r JOIN revision v ON v.id = r.revision_id "
                  "WHERE v.label = 'r2' ORDER BY r.id")
    sql(lg, f"UPDATE result SET revision_id = {r3} WHERE id = {rid}")
    rep = audit(lg)
    details = [f.detail for f in rep.named("record altered", "result")]
    assert found(rep, "record altered", "result") == [("result", rid), ("result", rid)]
    assert any("points at revision x/r3, but its result batch" in d and "for x/r2" in d
               for d in details)
    assert [f.label for f in rep.named("record deleted", "result")] == ["x/r2 X-1 v1 on p v1"]


def test_result_moved_to_another_batch_is_deleted_from_one_inserted_in_the_other(lg):
    build(lg)
    b1, b2 = [r[0] for r in rows(lg, "SELECT id FROM result_batch ORDER BY id")]
    rid = one(lg, f"SELECT id FROM result WHERE batch_id = {b2} ORDER BY id")
    sql(lg, f"UPDATE result SET batch_id = {b1} WHERE id = {rid}")
    rep = audit(lg)
    assert found(rep, "record altered") == [("result", rid)]
    assert "re-pointed" in rep.findings[0].detail
    assert [f.label.split(" ")[0] for f in rep.named("record deleted", "result")] == ["x/r2"]


def test_chain_link_time_stamp_is_inside_the_hash(lg):
    build(lg)
    sql(lg, "UPDATE chain_link SET created_at = '2020-01-01 00:00:00' WHERE seq = 10")
    rep = audit(lg)
    assert found(rep, "link altered") == [("chain_link", 10)]


# -- deletions ---------------------------------------------------------------------------
DELETES = {
    "plant": "DELETE FROM plant",
    "plant_version": "DELETE FROM plant_version",
    "loop": "DELETE FROM loop",
    "requirement": "DELETE FROM requirement WHERE key = 'SYS-1'",
    "requirement_version": "DELETE FROM requirement_version WHERE title = 'Moves'",
    "revision": "DELETE FROM revision WHERE label = 'r2'",
    "result_batch": "DELETE FROM result_batch WHERE id = (SELECT min(id) FROM result_batch)",
    "baseline": "DELETE FROM baseline",
    "signoff": "DELETE FROM signoff",
}


@pytest.mark.parametrize("kind", sorted(DELETES))
def test_chained_record_deleted_is_named(lg, kind):
    build(lg)
    where = DELETES[kind].partition(" WHERE ")[2] or "1 = 1"
    rid = one(lg, f"SELECT min(id) FROM {kind} WHERE {where}")
    sql(lg, DELETES[kind], fk_off=True)
    rep = audit(lg)
    assert (kind, rid) in found(rep, "record deleted"), rep.findings


def test_result_deleted_is_named_by_its_subject(lg):
    build(lg)
    rid = one(lg, "SELECT r.id FROM result r JOIN requirement_version q "
                  "ON q.id = r.requirement_version_id JOIN revision v ON v.id = r.revision_id "
                  "WHERE q.title = 'Crossover' AND v.label = 'r1'")
    key = one(lg, f"SELECT metric_key FROM result WHERE id = {rid}")
    sql(lg, f"DELETE FROM result WHERE id = {rid}")
    rep = audit(lg)
    assert [(f.kind, f.label) for f in rep.named("record deleted")] == [
        ("result", "x/r1 X-2 v1 on p v1")]
    # the metric value it was judged from is left over: named too
    assert found(rep, "record inserted") == [("metric_value", key)]
    assert len(rep.findings) == 2


def test_metric_value_deleted_is_named(lg):
    build(lg)
    key = one(lg, "SELECT metric_key FROM result ORDER BY id")
    sql(lg, f"DELETE FROM metric_value WHERE key = '{key}'")
    rep = audit(lg)
    assert ("metric_value", key) in found(rep, "record deleted")


def test_chain_link_deleted_is_named(lg):
    build(lg)
    rid = one(lg, "SELECT record_id FROM chain_link WHERE seq = 1")
    sql(lg, "DELETE FROM chain_link WHERE seq = 1")  # the plant's link
    rep = audit(lg)
    assert ("chain_link", 2) in found(rep, "link altered")
    assert found(rep, "record inserted", "plant") == [("plant", rid)]


# -- insertions --------------------------------------------------------------------------
INSERTS = {
    "plant": "INSERT INTO plant (id, name, description, created_at) "
             "SELECT 90, 'q', '', created_at FROM plant",
    "plant_version": "INSERT INTO plant_version (id, plant_id, number, model_text, canonical, "
                     "sample_time, parameters_json, fidelity_json, samples, seed, input_unit, "
                     "output_unit, note, author, content_hash, created_at) SELECT 90, plant_id, "
                     "2, '9/(s+1)', '9/(s+1)', NULL, '{}', '{}', 0, 0, '', '', '', 'x', "
                     "content_hash, created_at FROM plant_version",
    "loop": "INSERT INTO loop (id, name, plant_id, kind, description, sensor_text, "
            "prefilter_text, input_delay, output_delay, sample_time, computation_delay, "
            "actuator_limit, created_at) SELECT 90, 'y', plant_id, kind, '', '', '', 0, 0, NULL, "
            "0, NULL, created_at FROM loop",
    "requirement": "INSERT INTO requirement (id, key, created_at) "
                   "SELECT 90, 'Z-1', created_at FROM requirement WHERE key = 'SYS-1'",
    "requirement_version": "INSERT INTO requirement_version (id, requirement_id, number, title, "
                           "statement, rationale, method, status, metric, settings_json, "
                           "comparator, limit_value, limit_text, author, note, content_hash, "
                           "created_at) SELECT 90, requirement_id, 2, title, statement, '', "
                           "method, status, metric, settings_json, comparator, 1.0, '>= 1 deg', "
                           "author, '', content_hash, created_at FROM requirement_version "
                           "WHERE title = 'Phase margin'",
    "revision": "INSERT INTO revision (id, loop_id, label, seq, parent_id, author, rationale, "
                "controller_text, controller_canonical, content_hash, created_at) "
                "SELECT 90, loop_id, 'r9', 9, NULL, 'someone', 'slipped in', '5', '5', 'x', "
                "created_at FROM revision WHERE label = 'r1'",
    "result_batch": "INSERT INTO result_batch (id, revision_id, results, subjects, digest, "
                    "created_at) SELECT 90, revision_id, 0, '', digest, created_at FROM "
                    "result_batch WHERE id = (SELECT min(id) FROM result_batch)",
    "baseline": "INSERT INTO baseline (id, name, note, author, supersedes_id, matrix_hash, "
                "created_at) SELECT 90, 'B9', '', author, NULL, matrix_hash, created_at "
                "FROM baseline",
    "signoff": "INSERT INTO signoff (id, baseline_id, name, role, statement, author, "
               "matrix_hash, chain_head, signed_at) SELECT 90, baseline_id, 'Someone Else', "
               "role, statement, author, matrix_hash, chain_head, signed_at FROM signoff",
}


@pytest.mark.parametrize("kind", sorted(INSERTS))
def test_chained_record_inserted_is_named(lg, kind):
    build(lg)
    sql(lg, INSERTS[kind])
    rep = audit(lg)
    assert (kind, 90) in found(rep, "record inserted"), rep.findings


def _insert_result(lg, batch: str, rv_title: str, label: str = "r1", fk_off=False) -> int:
    cols = ("revision_id, requirement_version_id, plant_version_id, verdict, value, headroom, "
            "headroom_fraction, worst_variant, pass_fraction, variants, reason, metric_key, "
            "engine_version, created_at, row_hash")
    sql(lg, f"INSERT INTO result (id, batch_id, {cols}) SELECT 900, {batch}, v.id, q.id, "
            "r.plant_version_id, 'pass', 99.0, 79.0, NULL, 'nominal', 1.0, 1, '', r.metric_key, "
            "r.engine_version, r.created_at, r.row_hash FROM result r, revision v, "
            f"requirement_version q WHERE v.label = '{label}' AND q.title = '{rv_title}' "
            "AND r.id = (SELECT min(id) FROM result)", fk_off=fk_off)
    return 900


def test_result_inserted_into_an_existing_batch_is_named(lg):
    build(lg)
    sql(lg, "INSERT INTO requirement_version (id, requirement_id, number, title, statement, "
            "rationale, method, status, metric, settings_json, comparator, limit_value, "
            "limit_text, author, note, content_hash, created_at) SELECT 80, requirement_id, 2, "
            "'Phase margin v2', statement, '', method, status, metric, settings_json, "
            "comparator, 1.0, '>= 1 deg', author, '', content_hash, created_at "
            "FROM requirement_version WHERE title = 'Phase margin'")
    bid = one(lg, "SELECT b.id FROM result_batch b JOIN revision v ON v.id = b.revision_id "
                  "WHERE v.label = 'r1'")
    rid = _insert_result(lg, str(bid), "Phase margin v2")
    rep = audit(lg)
    assert ("result", rid) in found(rep, "record inserted")
    assert ("result", rid) in found(rep, "record altered")  # its row hash was copied


def test_result_inserted_with_a_batch_of_its_own_is_named(lg):
    build(lg)
    sql(lg, "INSERT INTO result_batch (id, revision_id, results, subjects, digest, created_at) "
            "SELECT 70, revision_id, 1, subjects, digest, created_at FROM result_batch "
            "WHERE id = (SELECT min(id) FROM result_batch)")
    sql(lg, "DELETE FROM result WHERE batch_id = (SELECT min(id) FROM result_batch)")
    rid = _insert_result(lg, "70", "Phase margin")
    rep = audit(lg)
    assert ("result_batch", 70) in found(rep, "record inserted")
    assert ("result", rid) in found(rep, "record altered")


def test_result_with_no_batch_is_named(lg):
    build(lg)
    lg.add_revision("x", "2", rationale="unverified", verify=False)
    rid = _insert_result(lg, "12345", "Phase margin", "r3", fk_off=True)
    rep = audit(lg)
    assert ("result", rid) in found(rep, "record inserted")


def test_metric_value_inserted_is_named(lg):
    build(lg)
    sql(lg, "INSERT INTO metric_value (key, metric, values_json, engine_version, created_at, "
            f"row_hash) SELECT '{'e' * 64}', metric, values_json, engine_version, created_at, "
            "row_hash FROM metric_value WHERE key = (SELECT min(key) FROM metric_value)")
    rep = audit(lg)
    assert ("metric_value", "e" * 64) in found(rep, "record inserted")


def test_trace_and_loop_rows_belong_to_the_requirement_version(lg):
    build(lg)
    (vid,) = rows(lg, "SELECT v.id FROM requirement_version v JOIN requirement r "
                      "ON v.requirement_id = r.id WHERE r.key = 'X-1'")[0]
    sql(lg, f"DELETE FROM requirement_parent WHERE version_id = {vid}")
    rep = audit(lg)
    assert found(rep, "record altered") == [("requirement_version", vid)]


def test_signoff_bound_to_another_matrix_is_named_twice(lg):
    build(lg)
    (sid,) = rows(lg, "SELECT id FROM signoff")[0]
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
    sql(lg, "DELETE FROM chain_link WHERE seq = 12")  # the link of revision r2
    sql(lg, "INSERT INTO revision (id, loop_id, label, seq, parent_id, author, rationale, "
            "controller_text, controller_canonical, content_hash, created_at) "
            "SELECT 99, loop_id, 'r9', 9, NULL, 'someone', 'slipped in', '5', '5', 'x', created_at "
            "FROM revision WHERE label = 'r1'")
    rep = audit(lg)
    assert ("chain_link", 13) in found(rep, "link altered")  # sequence gap and broken prev hash
    (r2,) = rows(lg, "SELECT id FROM revision WHERE label = 'r2'")[0]
    assert sorted(found(rep, "record inserted")) == [("revision", r2), ("revision", 99)]


def test_cli_audit_exit_status(lg, monkeypatch):
    from ledger.cli import app

    build(lg)
    monkeypatch.setenv("LOOPLEDGER_DB", lg.url)
    runner = CliRunner()
    res = runner.invoke(app, ["audit"])
    assert res.exit_code == 0, res.output
    assert "ledger intact" in res.output
    assert "audit covers: 1 plant, 1 plant_version, 1 loop, 3 requirement" in res.output
    assert "4 result, 4 metric_value; 15 chain link(s)" in res.output
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
        assert rep.links == 4 + 12  # plant, its version, two loops; twelve revisions
    finally:
        a.close()
        b.close()


@pytest.mark.parametrize("value, text_", [
    (-0.0, "corner:K-,tau_m+"), (1e308, "é \"quoted\" \\ back"), (5, "\x0c form feed"),
    (0.1 + 0.2, "\u2028 line sep"), (None, ""),
])
def test_result_row_hash_is_the_compact_json_of_its_fields(value, text_):
    # Source: Python's json module (compact separators, ensure_ascii=False) and hashlib
    from ledger.chain import RESULT_FIELDS

    row = dict(revision_id=3, requirement_version_id=4, plant_version_id=5, verdict="pass",
               value=value, headroom=value, headroom_fraction=None, worst_variant=text_,
               pass_fraction=1, variants=10, reason=text_, metric_key="k" * 64,
               engine_version="e-1", created_at=datetime(2026, 1, 2, 3, 4, 5, 6, timezone.utc))
    vals = [row[f] for f in RESULT_FIELDS]
    vals[4] = vals[5] = None if value is None else float(value)
    vals[8] = 1.0  # a float column: an int stored there reads back as 1.0
    vals[-1] = "2026-01-02 03:04:05.000006"
    expect = hashlib.sha256(json.dumps(vals, separators=(",", ":"),
                                       ensure_ascii=False).encode()).hexdigest()
    assert result_row_hash(row) == expect
    assert result_row_hash({**row, "value": float("nan")}) == result_row_hash(
        {**row, "value": None})  # SQLite stores NaN as NULL
    with pytest.raises(ValueError, match="infinite"):
        result_row_hash({**row, "value": float("inf")})


def test_revision_recorded_unverified_then_verified_stays_intact(lg):
    """A boolean requirement (``stable``) has headroom exactly zero; computed as -0.0 it came
    back from SQLite as 0.0 (SQLite stores an integral REAL as an integer), so the row hash
    written did not match the stored row and the audit named an untouched result.  Zero is
    stored and hashed with one sign (common practice, no source: IEEE 754 -0.0 == 0.0)."""
    lg.add_plant("p", "1/(s*(s+1))")
    lg.add_loop("x", "p")
    lg.add_requirement("X-0", title="Stable", statement="The loop is stable.",
                       metric="stable", limit="true", loops=["x"])
    lg.add_requirement("X-1", title="Phase margin", statement="PM at least 20 deg.",
                       metric="phase_margin", limit=">= 20 deg", loops=["x"])
    lg.add_revision("x", "4", rationale="recorded first, verified later", verify=False)
    lg.verify(workers=1)
    rep = audit(lg)
    assert rep.ok, [(f.problem, f.kind, f.record_id) for f in rep.findings]
    signs = rows(lg, "SELECT headroom, headroom_fraction FROM result")
    assert all(math.copysign(1.0, v) > 0 for r in signs for v in r if v == 0.0)



def test_row_hashed_with_negative_zero_before_the_fix_still_reads_intact(lg):
    """A ledger written before zeros were stored with one sign holds rows hashed with -0.0 that
    SQLite gives back as 0.0: the audit's row check accepts that sign of zero, and only that."""
    from types import SimpleNamespace

    from ledger.store.audit import _signed_zero_match

    test_revision_recorded_unverified_then_verified_stays_intact(lg)
    engine = make_engine(lg.url)
    with engine.connect() as conn:
        row = dict(conn.execute(text("SELECT * FROM result WHERE headroom = 0")).mappings()
                   .first())
    engine.dispose()
    legacy = result_row_hash(dict(row, headroom=-0.0, headroom_fraction=-0.0))
    assert legacy != row["row_hash"] == result_row_hash(row)
    assert _signed_zero_match(SimpleNamespace(_mapping=row, row_hash=legacy))
    assert not _signed_zero_match(SimpleNamespace(_mapping=dict(row, headroom=1.0),
                                                  row_hash=legacy))


def test_plant_with_parameters_out_of_alphabetical_order_audits_clean(lg):
    """Parameters are kept in the order given and hashed in canonical (sorted) order
    (docs/models.md); the audit and sign-off recompute the same hash, so a plant whose
    parameters are not given alphabetically is intact, and an edited parameter is still named."""
    lg.add_plant("p", "K/(s*(tau*s+1))", params={"tau": {"nominal": 0.02, "tol": "20 %"},
                                                   "K": {"nominal": 120.0, "tol": "10 %"}})
    lg.add_loop("x", "p")
    lg.add_requirement("X-1", title="Phase margin", statement="PM at least 20 deg.",
                       metric="phase_margin", limit=">= 20 deg", loops=["x"])
    lg.add_revision("x", "0.5", rationale="proportional")
    rep = audit(lg)
    assert rep.ok, [(f.problem, f.kind, f.record_id, f.detail) for f in rep.findings]
    create_baseline(lg, "B1")
    sign_baseline(lg, "B1", signer="A. Reviewer", role="lead", statement="approved")
    sql(lg, "UPDATE plant_version SET parameters_json = REPLACE(parameters_json, '120.0', '130.0')")
    assert ("plant_version", 1) in found(audit(lg), "record altered", "plant_version")
