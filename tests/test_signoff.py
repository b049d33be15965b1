"""Baselines and sign-offs: freezing, the matrix hash, refusals, supersession, and the upgrade
of a schema-0002 ledger (links backfilled by migration 0003)."""

from __future__ import annotations

import hashlib
import json
import math
import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import text

from ledger.api import open_ledger
from ledger.audit import audit
from ledger.chain import GENESIS
from ledger.errors import DuplicateError, IntegrityViolation, NotFoundError
from ledger.store.db import make_engine
from ledger.signoff import baseline, baselines, create_baseline, sign_baseline

FIXTURES = Path(__file__).parent / "fixtures"


def build_small(lg, k: float = 4.0):
    """Plant 1/(s(s+1)) under proportional control k: L = k/(s(s+1)), one requirement."""
    lg.add_plant("p", "1/(s*(s+1))")
    lg.add_loop("x", "p")
    lg.add_requirement("X-1", title="Phase margin", statement="PM at least 20 deg.",
                       metric="phase_margin", limit=">= 20 deg", loops=["x"], status="approved")
    lg.add_revision("x", f"{k}", rationale="proportional gain")
    return lg


def pm_closed_form(k: float) -> float:
    """Phase margin (deg) of k/(s(s+1)).
    # Source: textbook closed form: |L(jw)| = 1 gives w^4 + w^2 - k^2 = 0, PM = 90 deg - atan(w)."""
    wc = math.sqrt((-1.0 + math.sqrt(1.0 + 4.0 * k * k)) / 2.0)
    return 90.0 - math.degrees(math.atan(wc))


def independent_matrix_hash(b) -> str:
    """The baseline's matrix hash rebuilt from its public fields with the standard library only
    (json + hashlib), following the documented canonical form."""
    # Source: docs/signoff.md (canonical form); SHA-256 from Python's hashlib (FIPS 180-4).
    def num(x):
        return ("inf" if x > 0 else "-inf") if isinstance(x, float) and math.isinf(x) else x

    cols = [{"loop": c.loop, "revision": c.revision, "revision_hash": c.revision_hash,
             "plant": c.plant, "plant_version": c.plant_version, "plant_hash": c.plant_hash}
            for c in b.columns]
    cells = [{"requirement": c.requirement, "requirement_version": c.requirement_version,
              "requirement_hash": c.requirement_hash, "limit": c.limit, "loop": c.loop,
              "revision": c.revision, "revision_hash": c.revision_hash, "plant": c.plant,
              "plant_version": c.plant_version, "plant_hash": c.plant_hash,
              "verdict": c.verdict, "value": num(c.value), "headroom": num(c.headroom),
              "engine_version": c.engine_version} for c in b.cells]
    doc = {"columns": sorted(cols, key=lambda c: (c["loop"], c["revision"])),
           "cells": sorted(cells, key=lambda c: (c["loop"], c["revision"], c["requirement"]))}
    text = json.dumps(doc, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def test_baseline_freezes_tips_with_values_and_hash(lg):
    build_small(lg, k=4.0)
    b = create_baseline(lg, "B1", note="first")
    assert [(c.loop, c.revision) for c in b.columns] == [("x", "r1")]
    (cell,) = b.cells
    assert (cell.requirement, cell.requirement_version, cell.verdict) == ("X-1", 1, "pass")
    assert cell.revision_hash == lg.revision("x").content_hash
    assert cell.requirement_hash == lg.requirement("X-1").content_hash
    assert cell.plant_hash == lg.plant("p").content_hash
    # the frozen value is the phase margin of 4/(s(s+1)) (about 28.0 deg)
    np.testing.assert_allclose(cell.value, pm_closed_form(4.0), rtol=1e-6)
    np.testing.assert_allclose(cell.headroom, pm_closed_form(4.0) - 20.0, rtol=1e-6)
    assert b.matrix_hash == independent_matrix_hash(b)
    assert not b.signed and baselines(lg)[0].name == "B1"
    with pytest.raises(DuplicateError, match="exists"):
        create_baseline(lg, "B1")
    with pytest.raises(NotFoundError, match="no baseline"):
        baseline(lg, "nope")


def test_sign_records_approval_bound_to_hash_and_chain_head(lg):
    build_small(lg)
    b = create_baseline(lg, "B1")
    so = sign_baseline(lg, "B1", signer="A. Reviewer", role="controls lead",
                       statement="Margins reviewed; approved for bench tests.")
    assert so.matrix_hash == b.matrix_hash == independent_matrix_hash(baseline(lg, "B1"))
    # the head recorded is the chain hash of the last link before the sign-off's own link:
    # the baseline's link
    engine = make_engine(lg.url)
    with engine.connect() as conn:
        links = conn.execute(text("SELECT kind, prev_hash, chain_hash FROM chain_link "
                                  "ORDER BY seq")).all()
    engine.dispose()
    assert [k for k, _, _ in links[-2:]] == ["baseline", "signoff"]
    assert so.chain_head == links[-2][2] == links[-1][1]
    b = baseline(lg, "B1")
    assert b.signed and b.signoffs[0].role == "controls lead"
    with pytest.raises(IntegrityViolation, match="a statement is required"):
        sign_baseline(lg, "B1", signer="x", role="y", statement="  ")
    assert audit(lg).ok


def test_signed_baseline_cannot_change_only_be_superseded(lg):
    build_small(lg)
    create_baseline(lg, "B1")
    # unsigned: may be refrozen; the chain records both states and stays intact
    lg.add_revision("x", "3", rationale="less gain", verify=True)
    b1 = create_baseline(lg, "B1", replace=True)
    assert [c.revision for c in b1.columns] == ["r2"]
    assert audit(lg).ok
    sign_baseline(lg, "B1", signer="A", role="lead", statement="ok")
    before = baseline(lg, "B1")
    with pytest.raises(IntegrityViolation, match="signed and can never change"):
        create_baseline(lg, "B1", replace=True)
    assert baseline(lg, "B1") == before
    b2 = create_baseline(lg, "B2", supersedes="B1", revisions=[("x", "r1")])
    assert b2.supersedes == "B1" and baseline(lg, "B1").superseded_by == "B2"
    with pytest.raises(IntegrityViolation, match="already superseded by 'B2'"):
        create_baseline(lg, "B3", supersedes="B1")
    with pytest.raises(IntegrityViolation, match="superseded by 'B2'"):
        sign_baseline(lg, "B1", signer="B", role="qa", statement="late")
    sign_baseline(lg, "B2", signer="B", role="qa", statement="ok")
    assert audit(lg).ok


def test_sign_refused_when_results_changed(lg):
    build_small(lg)
    create_baseline(lg, "B1")
    # a new requirement version (tighter limit) is judged at once on the tip: matrix differs
    lg.edit_requirement("X-1", limit=">= 25 deg")
    with pytest.raises(IntegrityViolation, match=r"results changed since baseline 'B1'.*X-1 on x/r1"):
        sign_baseline(lg, "B1", signer="A", role="lead", statement="ok")
    assert not baseline(lg, "B1").signed
    create_baseline(lg, "B2", supersedes="B1")
    # a new plant version makes the results stale until verified
    lg.add_plant("p", "1.1/(s*(s+1))")
    with pytest.raises(IntegrityViolation, match="pass -> stale"):
        sign_baseline(lg, "B2", signer="A", role="lead", statement="ok")
    # freezing the stale state is allowed, signing it is not
    create_baseline(lg, "B3", supersedes="B2")
    with pytest.raises(IntegrityViolation, match="stale or unverified"):
        sign_baseline(lg, "B3", signer="A", role="lead", statement="ok")
    lg.verify("x")
    create_baseline(lg, "B4", supersedes="B3")
    so = sign_baseline(lg, "B4", signer="A", role="lead", statement="ok")
    cell = baseline(lg, "B4").cells[0]
    assert (cell.plant_version, cell.requirement_version) == (2, 2)
    # Source: same closed form with k = 4 * 1.1
    np.testing.assert_allclose(cell.value, pm_closed_form(4.4), rtol=1e-6)
    assert so.matrix_hash == independent_matrix_hash(baseline(lg, "B4"))
    assert audit(lg).ok


def test_chosen_revisions_and_bad_selection(lg):
    build_small(lg)
    lg.add_revision("x", "2", rationale="half gain")
    b = create_baseline(lg, "B1", revisions=[("x", "r1"), ("x", "r2")])
    assert sorted(c.revision for c in b.columns) == ["r1", "r2"]
    values = {c.revision: c.value for c in b.cells}
    np.testing.assert_allclose(values["r2"], pm_closed_form(2.0), rtol=1e-6)
    with pytest.raises(NotFoundError):
        create_baseline(lg, "B2", revisions=[("x", "r9")])
    with pytest.raises(IntegrityViolation, match="not allowed"):
        create_baseline(lg, "bad name")


def test_upgrade_from_0002_keeps_records_and_backfills_chain(tmp_path, monkeypatch):
    import ledger.engine.results as engine_results

    path = tmp_path / "old.db"
    shutil.copy(FIXTURES / "ledger-0002.db", path)
    with sqlite3.connect(path) as db:
        before = {t: db.execute(f"SELECT * FROM {t} ORDER BY 1").fetchall()
                  for t in ("plant", "plant_version", "loop", "revision", "requirement",
                            "requirement_version", "requirement_parent", "requirement_loop",
                            "result", "metric_value")}
    db.close()
    lg = open_ledger(path, author="tester")
    try:
        assert lg.schema_action == "upgraded from 0002"
        with sqlite3.connect(path) as db:
            after = {t: db.execute(f"SELECT * FROM {t} ORDER BY 1").fetchall() for t in before}
            links = db.execute("SELECT seq, kind, record_id, record_hash, prev_hash, chain_hash, "
                               "created_at FROM chain_link ORDER BY seq").fetchall()
        db.close()
        # every old column keeps its value (0005 appends batch_id/row_hash columns)
        assert {k: [r[:len(before[k][0])] for r in v] for k, v in after.items()} == before
        # every existing revision (2) and requirement version (3) got one link, oldest first
        # (0003); then the plant, its version, the loop, both requirements and the two result
        # batches 0005 made (one per revision), in order of creation
        assert [(k, r) for _, k, r, *_ in links] == [
            ("requirement_version", 1), ("requirement_version", 2), ("revision", 1),
            ("revision", 2), ("requirement_version", 3), ("plant", 1), ("plant_version", 1),
            ("loop", 1), ("requirement", 1), ("requirement", 2), ("result_batch", 1),
            ("result_batch", 2)]
        prev = GENESIS
        for seq, kind, rid, rh, ph, ch, at in links:
            # Source: chain rule of docs/signoff.md, SHA-256 from Python's hashlib
            assert ph == prev
            assert ch == hashlib.sha256(f"{ph}:{kind}:{rid}:{rh}:{at}".encode()).hexdigest()
            prev = ch
        rep = audit(lg)  # the live record hashes agree with the migration's backfill
        assert rep.ok, rep.findings
        # the API works on the upgraded ledger, and new records extend the chain
        assert lg.requirement("SH-2").limit_text == "<= 0.4 s"
        # the fixture's results were computed by engine-1: stale under today's engine, current
        # under the engine that computed them (docs/history.md, "When the engine changes")
        assert [r.verdict for r in lg.results("shaker-speed", "r2")] == ["stale", "stale"]
        monkeypatch.setattr(engine_results, "ENGINE_VERSION", "engine-1")
        assert [r.verdict for r in lg.results("shaker-speed", "r2")] == ["pass", "fail"]
        b = create_baseline(lg, "B1")
        assert b.counts() == {"pass": 1, "fail": 1}
        np.testing.assert_allclose([c.value for c in b.cells], [52.5, 0.45], rtol=0)  # fixture rows
        with pytest.raises(IntegrityViolation, match=r"first: SH-2 on shaker-speed/r2 is fail"):
            sign_baseline(lg, "B1", signer="A", role="lead", statement="fail accepted for now")
        sign_baseline(lg, "B1", signer="A", role="lead", statement="fail accepted for now",
                      accept=["SH-2@shaker-speed:r2"])
        lg.add_revision("shaker-speed", "pi(kp=0.1, ki=1.1)", rationale="back off", verify=False)
        rep = audit(lg)
        assert rep.ok and rep.links == 12 + 3  # a baseline, its sign-off, revision r3

    finally:
        lg.close()


def test_infinite_gain_margin_is_frozen_and_hashed(lg):
    # k/(s(s+1)) never reaches -180 deg of phase: no phase crossover, gain margin infinite.
    # Source: textbook (phase of 1/(s(s+1)) is -90 deg - atan(w) > -180 deg for all w > 0).
    build_small(lg)
    lg.add_requirement("X-2", title="Gain margin", statement="GM at least 6 dB.",
                       metric="gain_margin", limit=">= 6 dB", loops=["x"], status="approved")
    b = create_baseline(lg, "B1")
    cells = {c.requirement: c for c in b.cells}
    assert cells["X-2"].verdict == "pass"
    assert math.isinf(cells["X-2"].value) and cells["X-2"].value > 0
    assert b.matrix_hash == independent_matrix_hash(b)
    sign_baseline(lg, "B1", signer="A", role="lead", statement="ok")
    assert audit(lg).ok


# -- sign-off recomputes what a baseline freezes (plain SQL edits behind the ledger's back) ----
def _sql(lg, *statements: str) -> None:
    engine = make_engine(lg.url)
    with engine.begin() as conn:
        for st in statements:
            conn.execute(text(st))
    engine.dispose()


def _relink(lg, kind: str, table: str) -> None:
    """What someone holding the code could do after an edit: recompute the edited record's
    link and every link after it, so that the chain itself verifies again."""
    from sqlalchemy.orm import Session

    from ledger.chain import link_hash, record_hash
    from ledger.store.models import ChainLink

    engine = make_engine(lg.url)
    with Session(engine) as s, s.begin():
        rid = s.execute(text(f"SELECT min(id) FROM {table}")).scalar_one()
        links = s.query(ChainLink).order_by(ChainLink.seq).all()
        prev = GENESIS
        for ln in links:
            if ln.kind == kind and ln.record_id == rid:
                ln.record_hash = record_hash(s, kind, rid)
            ln.prev_hash = prev
            ln.chain_hash = link_hash(prev, ln.kind, ln.record_id, ln.record_hash, ln.created_at)
            prev = ln.chain_hash
    engine.dispose()


def _signoffs(lg) -> int:
    engine = make_engine(lg.url)
    with engine.connect() as conn:
        n = conn.execute(text("SELECT count(*) FROM signoff")).scalar_one()
    engine.dispose()
    return n


SIGN_TAMPER = {
    "plant model text": ("UPDATE plant_version SET model_text = '2/(s*(s+1))'",
                         r"plant_version 1 \(p v1\): content differs from chain link"),
    "plant parameters": ("UPDATE plant_version SET parameters_json = '{\"K\": 2}'",
                         r"plant_version 1 \(p v1\): content differs"),
    "plant": ("UPDATE plant SET name = 'q'", r"record altered: plant 1 \(q\)"),
    "loop": ("UPDATE loop SET output_delay = 0.2", r"record altered: loop 1 \(x\)"),
    "controller": ("UPDATE revision SET controller_text = '40'",
                   r"record altered: revision 1 \(x/r1\)"),
    "requirement limit": ("UPDATE requirement_version SET limit_value = 1.0",
                          r"record altered: requirement_version 1 \(X-1 v1\)"),
    "metric value": ("UPDATE metric_value SET values_json = replace(values_json, '.', '0.')",
                     r"record altered: metric_value \w+ \(phase_margin\)"),
    "result": ("UPDATE result SET worst_variant = 'elsewhere'",
               r"record altered: result 1 \(x/r1 X-1 v1 on p v1\)"),
    "chain link time": ("UPDATE chain_link SET created_at = '2021-01-01 00:00:00' WHERE seq = 2",
                        r"link altered: chain_link 2"),
}


@pytest.mark.parametrize("case", sorted(SIGN_TAMPER))
def test_sign_refused_when_a_frozen_record_was_edited_by_sql(lg, case):
    build_small(lg)
    create_baseline(lg, "B1")
    statement, message = SIGN_TAMPER[case]
    _sql(lg, statement)
    with pytest.raises(IntegrityViolation, match=rf"^baseline 'B1': .*{message}"):
        sign_baseline(lg, "B1", signer="A", role="lead", statement="ok")
    assert _signoffs(lg) == 0  # nothing signed


def test_sign_refused_when_results_were_edited_to_pass_before_freezing(lg):
    build_small(lg, k=40.0)  # PM of 40/(s(s+1)) is about 9 deg: fails >= 20 deg
    assert [r.verdict for r in lg.results("x")] == ["fail"]
    _sql(lg, "UPDATE result SET verdict = 'pass', value = 25.0, headroom = 5.0")
    b = create_baseline(lg, "B1")  # the frozen copy carries the edited verdict...
    assert b.counts() == {"pass": 1}
    with pytest.raises(IntegrityViolation, match=r"record altered: result 1 \(x/r1 X-1 v1"):
        sign_baseline(lg, "B1", signer="A", role="lead", statement="ok")  # ...sign-off refuses
    assert _signoffs(lg) == 0
    assert not audit(lg).ok


def test_sign_recomputes_content_hashes_even_when_the_chain_was_rewritten(lg):
    # parameters edited and the chain recomputed by someone holding the code, but the plant
    # version's content hash (which the frozen matrix carries) left as frozen
    build_small(lg)
    create_baseline(lg, "B1")
    _sql(lg, "UPDATE plant_version SET parameters_json = '{\"K\": 2}'")
    _relink(lg, "plant_version", "plant_version")
    with pytest.raises(IntegrityViolation,
                       match=r"plant_version 1 \(p v1\): content hash does not match its model"):
        sign_baseline(lg, "B1", signer="A", role="lead", statement="ok")
    assert [f.detail for f in audit(lg).findings] == [
        "content hash does not match its model and parameters"]


def test_sign_reparses_frozen_model_text(lg):
    # only the model text changed (canonical form and hashes kept), chain recomputed: the
    # stored canonical form is no longer the text's
    build_small(lg)
    create_baseline(lg, "B1")
    _sql(lg, "UPDATE plant_version SET model_text = '3/(s*(s+1))'")
    _relink(lg, "plant_version", "plant_version")
    assert audit(lg).ok  # the audit does not parse models (see docs/signoff.md)
    with pytest.raises(IntegrityViolation,
                       match=r"plant_version 1 \(p v1\): canonical form does not match its model"):
        sign_baseline(lg, "B1", signer="A", role="lead", statement="ok")
    assert _signoffs(lg) == 0
