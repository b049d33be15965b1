"""Waivers: append-only, chained records of an accepted failure (reason, approver, role, until
when); the matrix shows a waived failure as its own state, exports carry the waiver, sign-off
refuses an unwaived failure and lists what it accepted, the gate holds on a live waiver and
fails on an expired one, the audit names a tampered waiver.  Both back ends (``db_url``).

The loop is the type-1 servo L = K/(s(s+1)): its phase margin is atan(1/w_c) with
w_c^2 = (sqrt(1 + 4 K^2) - 1)/2 (closed form, common practice, no source): 51.83 deg at K = 1
(passes ">= 45 deg") and 38.67 deg at K = 2 (fails it).  The rules checked (a deviation is
accepted only with a recorded reason, a named approver and a limit in time or condition; a
withdrawal is a new record; an expired waiver covers nothing) are common practice, no source.
"""

from __future__ import annotations

import hashlib
import json
from datetime import timezone

import pytest
from sqlalchemy import text
from typer.testing import CliRunner

from ledger.api import open_ledger
from ledger.audit import audit
from ledger.chain import GENESIS
from ledger.cli import app
from ledger.errors import IntegrityViolation, NotFoundError, UsageError, WaiverError
from ledger.history.gate import gate
from ledger.history.matrix import build_matrix
from ledger.signoff import baseline, create_baseline, sign_baseline
from ledger.store.db import make_engine

REASON = "PM 38.7 deg accepted on the bench rig: amplitude kept below 10 % of range"


def _ledger(db_url, k: float = 2.0):
    """Plant K/(s(s+1)) with K = ``k`` under unit gain; X-1 phase margin >= 45 deg, X-2
    stable.  K = 2: X-1 fails (38.67 deg), X-2 passes."""
    lg = open_ledger(db_url, create=True, author="tester")
    lg.add_plant("p", "K/(s*(s+1))", params={"K": k})
    lg.add_loop("x", "p")
    lg.add_requirement("X-1", title="Phase margin", statement="PM at least 45 deg.",
                       metric="phase_margin", limit=">= 45 deg", loops=["x"], status="approved")
    lg.add_requirement("X-2", title="Stable", statement="The loop is stable.",
                       metric="stable", limit="true", loops=["x"], status="approved")
    lg.add_requirement("SYS-1", title="Moves", statement="Moves settle.")
    lg.add_revision("x", "1", rationale="unity gain")
    return lg


def _waive(lg, **kw):
    args = dict(loop="x", reason=REASON, approver="R. Chen", role="controls lead")
    args.update(kw)
    return lg.add_waiver("X-1", **args)


def _sql(lg, *statements: str) -> None:
    engine = make_engine(lg.url)
    with engine.begin() as conn:
        for st in statements:
            conn.execute(text(st))
    engine.dispose()


def _links(lg):
    engine = make_engine(lg.url)
    with engine.connect() as conn:
        out = conn.execute(text("SELECT seq, kind, record_id, record_hash, prev_hash, "
                                "chain_hash, created_at FROM chain_link ORDER BY seq")).all()
    engine.dispose()
    return out


def _cli(db_url, *args):
    return CliRunner().invoke(app, ["--db", db_url, *args])


# -- chain and audit -----------------------------------------------------------------------
def test_waiver_and_withdrawal_are_chained_and_audited(db_url):
    with _ledger(db_url) as lg:
        w = _waive(lg, expires="2031-01-31", condition="until the next hardware build",
                   as_of="2030-06-01")
        assert (w.requirement, w.scope, w.expires_on, w.withdrawn_at) == \
            ("X-1", "x/r1", "2031-01-31", None)
        lg.withdraw_waiver(w.id, reason="margin restored in r2", approver="R. Chen",
                           role="controls lead")
        (after,) = lg.waivers("X-1")
        assert after.withdrawn_by == "R. Chen" and after.reason == REASON  # never edited
        links = _links(lg)
        assert [ln.kind for ln in links[-2:]] == ["waiver", "waiver_withdrawal"]
        prev = GENESIS
        for seq, kind, rid, rh, ph, ch, at in links:
            # Source: chain rule of docs/signoff.md, SHA-256 from Python's hashlib
            if not isinstance(at, str):  # PostgreSQL hands back an aware time
                at = at.astimezone(timezone.utc).replace(tzinfo=None).isoformat(
                    sep=" ", timespec="microseconds")
            stamp = at
            assert ph == prev
            assert ch == hashlib.sha256(f"{ph}:{kind}:{rid}:{rh}:{stamp}".encode()).hexdigest()
            prev = ch
        assert links[-2].record_hash == after.record_hash
        rep = audit(lg)
        assert rep.ok, rep.findings
        assert rep.records["waiver"] == 1 and rep.records["waiver_withdrawal"] == 1


def test_tampered_waiver_is_named_by_audit_and_refused_by_sign(db_url):
    with _ledger(db_url) as lg:
        w = _waive(lg)
        create_baseline(lg, "B1")
        _sql(lg, f"UPDATE waiver SET reason = 'no reason needed' WHERE id = {w.id}")
        rep = audit(lg)
        (f,) = rep.named("record altered", "waiver")
        assert f.record_id == w.id and f.label == "X-1 on x/r1", str(f)
        assert str(f).startswith(f"record altered: waiver {w.id} (X-1 on x/r1)")
        before = lg.counts()
        with pytest.raises(IntegrityViolation, match=rf"record altered: waiver {w.id}"):
            sign_baseline(lg, "B1", signer="A", role="lead", statement="ok")
        assert lg.counts() == before


def test_deleted_withdrawal_is_named_by_audit(db_url):
    # deleting a withdrawal would revive the waiver: the audit names the missing record
    with _ledger(db_url) as lg:
        w = _waive(lg)
        lg.withdraw_waiver(w.id, reason="fixed", approver="R. Chen", role="controls lead")
        _sql(lg, "DELETE FROM waiver_withdrawal")
        assert [f.kind for f in audit(lg).named("record deleted")] == ["waiver_withdrawal"]


# -- the matrix state ----------------------------------------------------------------------
def test_matrix_shows_a_waived_failure_as_its_own_state(db_url):
    with _ledger(db_url) as lg:
        e = build_matrix(lg).cell("X-1", "x", "r1")
        assert (e.verdict, e.state) == ("fail", "fail")
        w = _waive(lg)
        m = build_matrix(lg)
        e = m.cell("X-1", "x", "r1")
        assert (e.verdict, e.state, e.waiver.id) == ("fail", "waived", w.id)  # never "pass"
        assert m.cell("X-2", "x", "r1").state == "pass"  # a pass stays a pass
        assert m.state_counts() == {"waived": 1, "pass": 1}
        # a new revision is not covered by the waiver of r1
        lg.add_revision("x", "1.01", rationale="trim")
        assert build_matrix(lg).cell("X-1", "x", "r2").state == "fail"


def test_stale_cell_is_not_covered_by_a_waiver(db_url):
    # a waiver accepts a judged failure; a stale cell's verdict is not known: verify first
    with _ledger(db_url) as lg:
        _waive(lg)
        lg.add_plant("p", "K/(s*(s+1))", params={"K": 2.05})
        e = build_matrix(lg).cell("X-1", "x", "r1")
        assert e.state == "stale" and e.waiver is None
        assert not gate(lg).ok


# -- sign-off ------------------------------------------------------------------------------
def test_sign_refuses_an_unwaived_failure_naming_the_cell(db_url):
    with _ledger(db_url) as lg:
        create_baseline(lg, "B1")
        before = lg.counts()
        with pytest.raises(IntegrityViolation) as exc:
            sign_baseline(lg, "B1", signer="A. Reviewer", role="lead", statement="ok")
        msg = str(exc.value)
        assert "\n" not in msg and "first: X-1 on x/r1 is fail" in msg, msg
        assert lg.counts() == before  # nothing written
    res = _cli(db_url, "sign", "B1", "--name", "A", "--role", "lead", "--statement", "ok")
    assert res.exit_code == 1
    assert res.output.strip().splitlines() == [
        line for line in res.output.strip().splitlines() if line.startswith("error: ")]
    assert "X-1 on x/r1 is fail" in res.output


def test_sign_accepts_a_waived_failure_and_lists_the_waiver(db_url):
    with _ledger(db_url) as lg:
        create_baseline(lg, "B1")
        w = _waive(lg, expires="2999-12-31")
        so = sign_baseline(lg, "B1", signer="A. Reviewer", role="lead", statement="ok")
        (used,) = so.waivers
        assert so.accepted == ()
        assert (used["waiver"], used["requirement"], used["loop"], used["revision"],
                used["verdict"], used["reason"], used["approver"], used["role"],
                used["expires_on"]) == (w.id, "X-1", "x", "r1", "fail", REASON, "R. Chen",
                                        "controls lead", "2999-12-31")
        assert used["record_hash"] == w.record_hash
        (stored,) = baseline(lg, "B1").signoffs
        assert stored.waivers == so.waivers
        assert audit(lg).ok
        # the list is part of the sign-off's record hash: editing it is named
        _sql(lg, "UPDATE signoff SET accepted_json = '' ")
        assert [f.kind for f in audit(lg).named("record altered")] == ["signoff"]


def test_sign_accepts_a_cell_named_explicitly_and_lists_it(db_url):
    with _ledger(db_url) as lg:
        create_baseline(lg, "B1")
        before = lg.counts()
        for bad, what in (("X-2@x:r1", "passes"), ("X-9@x:r1", "no such cell"),
                          ("X-1@y:r1", "no such cell")):
            with pytest.raises(WaiverError, match=what):
                sign_baseline(lg, "B1", signer="A", role="lead", statement="ok", accept=[bad])
        with pytest.raises(WaiverError, match="REQ@LOOP:LABEL"):
            sign_baseline(lg, "B1", signer="A", role="lead", statement="ok", accept=["X-1"])
        assert lg.counts() == before
    res = _cli(db_url, "sign", "B1", "--name", "A", "--role", "lead", "--statement",
               "fail accepted for the bench", "--accept", "X-1@x:r1")
    assert res.exit_code == 0, res.output
    assert "accepted X-1 on x/r1 (fail)" in res.output
    with open_ledger(db_url) as lg:
        (so,) = baseline(lg, "B1").signoffs
        assert so.accepted == ({"requirement": "X-1", "loop": "x", "revision": "r1",
                                "verdict": "fail"},)
        assert audit(lg).ok
    assert "accepted X-1 on x/r1 (fail)" in _cli(db_url, "baseline", "show", "B1").output


def test_expired_or_withdrawn_waiver_does_not_count_at_sign_off(db_url):
    with _ledger(db_url) as lg:
        create_baseline(lg, "B1")
        # added as of 2026-01-01, its last day 2026-06-30: expired on any day of signing
        _waive(lg, expires="2026-06-30", as_of="2026-01-01")
        with pytest.raises(IntegrityViolation, match="X-1 on x/r1 is fail"):
            sign_baseline(lg, "B1", signer="A", role="lead", statement="ok")
        w = _waive(lg, expires="2999-12-31")
        with pytest.raises(IntegrityViolation, match="X-1 on x/r1 is fail"):
            sign_baseline(lg, "B1", signer="A", role="lead", statement="ok",
                          as_of="3000-01-01")  # the day after its last day
        with pytest.raises(WaiverError, match="today or later"):
            sign_baseline(lg, "B1", signer="A", role="lead", statement="ok",
                          as_of="2026-01-01")
        lg.withdraw_waiver(w.id, reason="fixed", approver="R. Chen", role="controls lead")
        before = lg.counts()
        with pytest.raises(IntegrityViolation, match="X-1 on x/r1 is fail"):
            sign_baseline(lg, "B1", signer="A", role="lead", statement="ok")
        assert lg.counts() == before


def test_a_baseline_waiver_covers_the_cells_of_that_baseline(db_url):
    with _ledger(db_url) as lg:
        create_baseline(lg, "B1")
        w = lg.add_waiver("X-1", baseline="B1", reason=REASON, approver="R. Chen",
                          role="controls lead", condition="until the next hardware build")
        assert w.scope == "baseline B1" and w.covers == ("x/r1",)
        so = sign_baseline(lg, "B1", signer="A", role="lead", statement="ok")
        assert [u["waiver"] for u in so.waivers] == [w.id]
        assert so.waivers[0]["condition"] == "until the next hardware build"


# -- the gate ------------------------------------------------------------------------------
def test_gate_passes_a_waived_failure_and_fails_an_expired_one(db_url):
    with _ledger(db_url) as lg:
        assert not gate(lg).ok
        w = _waive(lg, expires="2031-01-31", as_of="2030-06-01")
        rep = gate(lg, as_of="2031-01-31")  # its last day
        assert rep.ok and [c.requirement for c in rep.waived] == ["X-1"]
        assert rep.passing == 2 and rep.cells == 2
        rep = gate(lg, as_of="2031-02-01")  # the day after
        assert not rep.ok and [(c.requirement, c.state) for c in rep.offending] == \
            [("X-1", "fail")]
    res = _cli(db_url, "gate", "--as-of", "2031-01-31")
    assert res.exit_code == 0, res.output
    assert "X-1 x/r1 waived" in res.output and f"waiver {w.id}" in res.output
    res = _cli(db_url, "gate", "--as-of", "2031-02-01")
    assert res.exit_code == 1 and "X-1 x/r1 fail" in res.output
    doc = json.loads(_cli(db_url, "gate", "--as-of", "2031-01-31", "--json").output)
    assert doc["ok"] and doc["waived"][0]["requirement"] == "X-1" and doc["as_of"] == "2031-01-31"
    with open_ledger(db_url) as lg:
        lg.withdraw_waiver(w.id, reason="fixed", approver="R. Chen", role="controls lead")
    assert _cli(db_url, "gate", "--as-of", "2031-01-31").exit_code == 1


# -- bad input -----------------------------------------------------------------------------
def test_bad_waivers_are_refused_in_one_line_and_change_nothing(db_url):
    with _ledger(db_url) as lg:
        create_baseline(lg, "B1")
        w = _waive(lg)
        lg.withdraw_waiver(w.id, reason="fixed", approver="R. Chen", role="controls lead")
        before = lg.counts()
        cases = [
            (NotFoundError, "no requirement with ID 'X-9'", dict(requirement="X-9")),
            (WaiverError, "in the past", dict(expires="2026-06-30", as_of="2026-07-01")),
            (WaiverError, "not a date", dict(expires="31/01/2031")),
            (WaiverError, "not a date", dict(expires="2031-02-30")),
            (WaiverError, "needs a reason", dict(reason="   ")),
            (WaiverError, "needs an approver", dict(approver="")),
            (WaiverError, "needs the approver's role", dict(role="")),
            (WaiverError, "has no metric", dict(requirement="SYS-1")),
            (NotFoundError, "no loop", dict(loop="nope")),
            (NotFoundError, "no revision 'r9'", dict(revision="r9")),
            (NotFoundError, "no baseline", dict(loop=None, baseline="B9")),
            (UsageError, "not both", dict(baseline="B1")),
            (UsageError, "not both", dict(loop=None)),
            (IntegrityViolation, r"waiver reason: character U\+001B", dict(reason="x\x1b[2J")),
            (IntegrityViolation, r"waiver approver: character U\+000A", dict(approver="A\nB")),
        ]
        for cls, msg, kw in cases:
            key = kw.pop("requirement", "X-1")
            args = dict(loop="x", reason=REASON, approver="R. Chen", role="controls lead")
            args.update(kw)
            with pytest.raises(cls, match=msg) as exc:
                lg.add_waiver(key, **args)
            assert "\n" not in str(exc.value)
        with pytest.raises(WaiverError, match="withdrawn already"):
            lg.withdraw_waiver(w.id, reason="again", approver="R. Chen", role="lead")
        with pytest.raises(NotFoundError, match="no waiver 99"):
            lg.withdraw_waiver(99, reason="x", approver="R. Chen", role="lead")
        with pytest.raises(WaiverError, match="needs a reason"):
            lg.withdraw_waiver(w.id, reason="", approver="R. Chen", role="lead")
        assert lg.counts() == before
    for args, msg in (
            (["waiver", "add", "X-9", "--loop", "x", "--reason", "r", "--approver", "a",
              "--role", "b"], "error: no requirement with ID 'X-9'"),
            (["waiver", "add", "X-1", "--loop", "x", "--reason", "", "--approver", "a",
              "--role", "b"], "error: a waiver needs a reason"),
            (["waiver", "add", "X-1", "--loop", "x", "--reason", "r", "--approver", "a",
              "--role", "b", "--expires", "2026-06-30", "--as-of", "2026-07-01"],
             "error: expiry 2026-06-30 is in the past")):
        res = _cli(db_url, *args)
        assert res.exit_code == 1
        assert res.output.strip().startswith(msg) and len(res.output.strip().splitlines()) == 1
    with open_ledger(db_url) as lg:
        assert lg.counts() == before


def test_waiver_cli_add_list_show_withdraw(db_url):
    _ledger(db_url).close()
    res = _cli(db_url, "waiver", "add", "X-1", "--loop", "x", "--reason", REASON,
               "--approver", "R. Chen", "--role", "controls lead", "--expires", "2031-01-31",
               "--condition", "until the next hardware build", "--as-of", "2030-06-01")
    assert res.exit_code == 0 and res.output.startswith("waiver 1: X-1 on x/r1"), res.output
    doc = json.loads(_cli(db_url, "waiver", "list", "--json", "--as-of", "2031-01-31").output)
    assert [(d["id"], d["status"], d["scope"]) for d in doc] == [(1, "live", "x/r1")]
    doc = json.loads(_cli(db_url, "waiver", "list", "--json", "--as-of", "2031-02-01").output)
    assert doc[0]["status"] == "expired"
    assert json.loads(_cli(db_url, "waiver", "list", "--live", "--json", "--as-of",
                           "2031-02-01").output) == []
    out = _cli(db_url, "waiver", "show", "1", "--as-of", "2031-01-31").output
    assert "until the next hardware build" in out and "R. Chen (controls lead)" in out
    res = _cli(db_url, "waiver", "withdraw", "1", "--reason", "fixed", "--approver", "R. Chen",
               "--role", "controls lead")
    assert res.exit_code == 0 and "withdrawn" in res.output
    assert "withdrawn" in _cli(db_url, "waiver", "list").output
    assert _cli(db_url, "waiver", "show", "7").exit_code == 1


# -- exports -------------------------------------------------------------------------------
def test_exports_carry_the_waived_state_with_reason_approver_and_expiry(tmp_path):
    import csv

    jsonschema = pytest.importorskip("jsonschema")
    from lxml import etree
    from openpyxl import load_workbook

    from ledger.exports import export_matrix, json_schema_path
    from ledger.exports.workbook import VERDICT_FILLS

    db = str(tmp_path / "w.db")
    with _ledger(db) as lg:
        w = _waive(lg, expires="2999-12-31", condition="until the next hardware build")
        m = build_matrix(lg)
        paths = {f: export_matrix(m, tmp_path / f"m.{s}", f, ledger=lg) for f, s in (
            ("csv", "csv"), ("json", "json"), ("xlsx", "xlsx"), ("junit", "xml"),
            ("reqif", "reqif"), ("html", "html"))}
    want = {"state": "waived", "verdict": "fail", "waiver": w.id, "waiver_reason": REASON,
            "waiver_approver": "R. Chen", "waiver_role": "controls lead",
            "waiver_expires": "2999-12-31", "waiver_condition": "until the next hardware build"}
    # JSON: valid against the shipped schema (an independent validator), the row carries it
    doc = json.loads(paths["json"].read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator(json.loads(json_schema_path().read_text())).validate(doc)
    row = next(r for r in doc["rows"] if r["requirement"] == "X-1")
    assert {k: row[k] for k in want} == want
    assert doc["counts"]["waived"] == 1 and doc["counts"]["fail"] == 0
    assert sum(doc["counts"].values()) == len(doc["rows"])
    # CSV (one preamble line, then the header)
    with paths["csv"].open(encoding="utf-8", newline="") as fh:
        rows = list(csv.DictReader(fh.readlines()[1:]))
    row = next(r for r in rows if r["requirement"] == "X-1")
    assert {k: row[k] for k in want} == {k: str(v) for k, v in want.items()}
    # XLSX: the state column, coloured as its own state
    ws = load_workbook(paths["xlsx"])["x"]
    cols = [c.value for c in ws[1]]
    (cells,) = [r for r in ws.iter_rows(min_row=2) if r[cols.index("requirement")].value == "X-1"]
    st = cells[cols.index("state")]
    assert st.value == "waived" and st.fill.fgColor.rgb.endswith(VERDICT_FILLS["waived"])
    assert cells[cols.index("waiver_approver")].value == "R. Chen"
    # JUnit: the waived case passes the build and carries the waiver
    root = etree.parse(str(paths["junit"])).getroot()
    assert root.get("failures") == "0" and root.get("errors") == "0"
    case = root.find(".//testcase[@name='X-1']")
    assert case.find("failure") is None
    out = case.find("system-out").text
    assert out.startswith("waived: fail accepted by waiver") and REASON in out
    assert "until 2999-12-31" in out
    # ReqIF and HTML name the state, the approver and the reason
    for f in ("reqif", "html"):
        body = paths[f].read_text(encoding="utf-8")
        assert "waived" in body and "R. Chen" in body and "until 2999-12-31" in body, f
        assert "does not replace hardware testing" in body  # the caution travels with it
