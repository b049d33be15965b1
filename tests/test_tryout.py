"""Dry runs (issue 17 item 1): ``Ledger.try_revision`` and ``loopledger try`` verify candidates
and record nothing; recording a tried candidate afterwards computes nothing.

The loop is the type-1 servo L = K/(s(s+1)) with unity feedback.  Its phase margin is
atan(1/w_c) with w_c^2 = (sqrt(1 + 4 K^2) - 1)/2 (closed form from |L(j w_c)| = 1, common
practice, no source): 51.83 deg at K = 1, 38.67 deg at K = 2 and 65.53 deg at K = 0.5, so
against a 45 deg limit K = 2 breaks the requirement a K = 1 tip passes and K = 0.5 does not.
"""

from __future__ import annotations

import json
import math

import pytest
from sqlalchemy import func, select
from typer.testing import CliRunner

from ledger.api import open_ledger
from ledger.cli import app
from ledger.store.chain import chain_head
from ledger.store.models import Base
from ledger.verification import tried


def _pm_deg(k: float) -> float:
    wc = math.sqrt((math.sqrt(1 + 4 * k * k) - 1) / 2)
    return math.degrees(math.atan(1 / wc))


def _ledger(db_url):
    lg = open_ledger(db_url, create=True, author="tester")
    lg.add_plant("p", "K/(s*(s+1))", params={"K": 1.0})
    lg.add_loop("x", "p")
    lg.add_requirement("X-1", title="Phase margin", statement="PM at least 45 deg.",
                       metric="phase_margin", limit=">= 45 deg", loops=["x"])
    lg.add_requirement("X-2", title="Stable", statement="The loop is stable.",
                       metric="stable", limit="true", loops=["x"])
    lg.add_revision("x", "1", rationale="unity gain")
    return lg


def _snapshot(lg) -> tuple[dict, str]:
    """Rows of every table of the schema, and the chain head."""
    with lg.reading() as s:
        rows = {t.name: s.execute(select(func.count()).select_from(t)).scalar_one()
                for t in Base.metadata.sorted_tables}
        return rows, chain_head(s)


def test_dry_run_records_nothing_and_classifies_against_the_tip(db_url):
    with _ledger(db_url) as lg:
        before = _snapshot(lg)
        rep = lg.try_revision("x", ["0.5", "2"])
        assert _snapshot(lg) == before          # no row in any table, the chain unchanged
        assert rep.against.label == "r1"
        a, b = rep.candidates
        pm = {c.name: {r.requirement: r for r in c.results}["X-1"] for c in rep.candidates}
        assert pm["A"].value == pytest.approx(_pm_deg(0.5), abs=1e-6)
        assert pm["B"].value == pytest.approx(_pm_deg(2.0), abs=1e-6)
        kinds_b = {c.requirement: c.kind for c in b.changes}
        assert kinds_b["X-1"] == "broke" and not b.breaks_nothing
        assert {c.requirement: c.kind for c in a.changes}["X-1"] == "improved"
        assert rep.safe == ("A",)
        assert [r.label for r in lg.revisions("x")] == ["r1"]


def test_recording_a_tried_candidate_computes_nothing(db_url):
    with _ledger(db_url) as lg:
        lg.try_revision("x", "0.7")
        n = lg.kernel_requests
        lg.add_revision("x", "0.7", rationale="the tried one")
        assert lg.kernel_requests == n          # every value came from the dry run
        res = {r.requirement: r for r in lg.results("x")}
        assert res["X-1"].value == pytest.approx(_pm_deg(0.7), abs=1e-6)
        # and the values reached the ledger's own cache: a second loop-free check
        n2 = lg.kernel_requests
        assert lg.verify() == [] and lg.kernel_requests == n2


def test_kept_values_survive_the_process_by_content_hash(sqlite_lg):
    lg = sqlite_lg
    lg.add_plant("p", "K/(s*(s+1))", params={"K": 1.0})
    lg.add_loop("x", "p")
    lg.add_requirement("X-1", title="PM", statement="PM", metric="phase_margin",
                       limit=">= 45 deg", loops=["x"])
    lg.try_revision("x", "1.5")
    tried.forget_memory()                     # as if `try` ran in another process
    n = lg.kernel_requests
    lg.add_revision("x", "1.5", rationale="from the files")
    assert lg.kernel_requests == n
    # a different controller shares no key and is computed
    lg.add_revision("x", "1.6", rationale="new")
    assert lg.kernel_requests > n


def test_a_damaged_kept_file_is_ignored_and_recomputed(sqlite_lg):
    lg = sqlite_lg
    lg.add_plant("p", "K/(s*(s+1))", params={"K": 1.0})
    lg.add_loop("x", "p")
    lg.add_requirement("X-1", title="PM", statement="PM", metric="phase_margin",
                       limit=">= 45 deg", loops=["x"])
    lg.try_revision("x", "1.5")
    tried.forget_memory()
    for f in tried.tried_dir().glob("*.json"):
        doc = json.loads(f.read_text())
        doc["payload"]["values"] = [99.0]     # the digest no longer matches
        f.write_text(json.dumps(doc))
    n = lg.kernel_requests
    lg.add_revision("x", "1.5", rationale="recomputed")
    assert lg.kernel_requests > n
    pm = {r.requirement: r for r in lg.results("x")}["X-1"]
    assert pm.value == pytest.approx(_pm_deg(1.5), abs=1e-6)


def test_cli_try_several_candidates_side_by_side(db_url):
    with _ledger(db_url) as lg:
        before = _snapshot(lg)
    res = CliRunner().invoke(app, ["--db", db_url, "try", "x", "0.5", "2", "--wide"])
    assert res.exit_code == 0, res.output
    assert "B: breaks X-1" in res.output and "A: breaks nothing" in res.output
    assert "breaks nothing: A" in res.output
    assert "38.67 deg" in res.output and "65.53 deg" in res.output
    res = CliRunner().invoke(app, ["--db", db_url, "try", "x", "2", "--json"])
    doc = json.loads(res.output)
    assert doc["recorded"] is False and doc["candidates"][0]["broken"] == ["X-1"]
    with open_ledger(db_url) as lg:
        assert _snapshot(lg) == before


def test_cli_try_one_candidate_prints_the_regression_table(db_url):
    _ledger(db_url).close()
    res = CliRunner().invoke(app, ["--db", db_url, "try", "x", "2", "--against", "r1", "--wide"])
    assert res.exit_code == 0, res.output
    assert "changes of candidate A against revision r1" in res.output
    assert "BROKE" in res.output and "nothing recorded" in res.output


def test_cli_try_bad_candidate_is_one_line_and_exit_1(db_url):
    with _ledger(db_url) as lg:
        before = _snapshot(lg)
    res = CliRunner().invoke(app, ["--db", db_url, "try", "x", "1", "pid(kp=1, kd=1)"])
    assert res.exit_code == 1
    assert "candidate B" in res.output
    res = CliRunner().invoke(app, ["--db", db_url, "try", "x", "1", "--against", "r9"])
    assert res.exit_code == 1 and "r9" in res.output
    with open_ledger(db_url) as lg:
        assert _snapshot(lg) == before
