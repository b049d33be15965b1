"""Traceability roll-up, coverage gaps and orphans (ledger.history.trace)."""

from __future__ import annotations

import math

import pytest

from ledger.api import open_ledger
from ledger.errors import NotFoundError
from ledger.history.trace import build_trace, worst_state


def _pm(k: float) -> float:
    """Phase margin (deg) of L = k/(s(s+1)): wc^2 = (sqrt(1+4k^2)-1)/2, pm = 90 - atan(wc).
    Source: derived from the phase-margin definition (any feedback-control textbook)."""
    wc = math.sqrt((math.sqrt(1 + 4 * k * k) - 1) / 2)
    return 90 - math.degrees(math.atan(wc))


def _wc(k: float) -> float:
    return math.sqrt((math.sqrt(1 + 4 * k * k) - 1) / 2)


def test_worst_state():
    # Roll-up order is our own rule (docs/history.md): violated > incomplete > satisfied.
    assert worst_state([]) == "satisfied"
    assert worst_state(["satisfied", "incomplete"]) == "incomplete"
    assert worst_state(["incomplete", "violated", "satisfied"]) == "violated"


@pytest.fixture
def tree(tmp_path):
    lg = open_ledger(tmp_path / "t.db", create=True, author="tester")
    lg.add_plant("servo", "1/(s*(s+1))")
    lg.add_loop("ax", "servo")
    lg.add_loop("ay", "servo")
    lg.add_revision("ax", "gain(1)", rationale="ax first", label="x1")
    lg.add_revision("ay", "gain(2)", rationale="ay first", label="y1")
    a = dict(status="approved")
    # level 1: needs without a metric; level 2: derived; level 3: derived from derived
    lg.add_requirement("NEED-1", title="move well", statement="Moves are well damped.", **a)
    lg.add_requirement("AX-PM", title="ax pm", statement="ax PM >= 45 deg", metric="phase_margin",
                       limit=">= 45 deg", loops=["ax"], parents=["NEED-1"], **a)
    lg.add_requirement("SUB-2", title="both axes", statement="Both axes robust.",
                       parents=["NEED-1"], **a)
    lg.add_requirement("AX-WC", title="ax speed", statement="ax wc >= 0.5 rad/s",
                       metric="gain_crossover", limit=">= 0.5 rad/s", loops=["ax"],
                       parents=["SUB-2"], **a)
    lg.add_requirement("AY-PM", title="ay pm", statement="ay PM >= 45 deg", metric="phase_margin",
                       limit=">= 45 deg", loops=["ay"], parents=["SUB-2"], **a)
    lg.add_requirement("NEED-2", title="fast", statement="Both axes fast.", **a)
    lg.add_requirement("BOTH-WC", title="wc both", statement="wc >= 0.5 rad/s on both",
                       metric="gain_crossover", limit=">= 0.5 rad/s", loops=["ax", "ay"],
                       parents=["NEED-2"], **a)
    yield lg
    lg.close()


def test_three_level_rollup(tree):
    # Closed form: ax k=1 -> pm 51.8 deg (pass), wc 0.786 (pass); ay k=2 -> pm 38.7 (fail),
    # wc 1.25 (pass).
    assert _pm(1.0) >= 45 and _wc(1.0) >= 0.5 and _pm(2.0) < 45 and _wc(2.0) >= 0.5
    t = build_trace(tree)
    assert [r.key for r in t.roots] == ["NEED-1", "NEED-2"]
    n1 = t.node("NEED-1")
    assert [c.key for c in n1.children] == ["AX-PM", "SUB-2"]
    assert [c.key for c in t.node("SUB-2").children] == ["AX-WC", "AY-PM"]
    assert t.node("AX-PM").state == "satisfied"
    assert t.node("AX-WC").state == "satisfied"
    ay = t.node("AY-PM")
    assert ay.state == "violated" and [(v.loop, v.revision, v.verdict) for v in ay.verdicts] == [("ay", "y1", "fail")]
    assert t.node("SUB-2").state == "violated" and t.node("SUB-2").own_state is None
    assert n1.state == "violated"
    both = t.node("BOTH-WC")
    assert [(v.loop, v.verdict) for v in both.verdicts] == [("ax", "pass"), ("ay", "pass")]
    assert t.node("NEED-2").state == "satisfied"
    assert t.counts() == {"satisfied": 4, "violated": 3}
    assert t.gaps == () and t.orphans == ()
    # a gentler ay revision (k = 0.5: pm 65.5 deg) repairs the whole branch up to the root
    assert _pm(0.5) >= 45 and _wc(0.5) < 0.5
    tree.add_revision("ay", "gain(0.5)", rationale="ay gentler", label="y2")
    t = build_trace(tree)
    assert t.node("AY-PM").state == "satisfied"
    assert t.node("SUB-2").state == "satisfied" and t.node("NEED-1").state == "satisfied"
    # ...but the crossover on ay now fails: BOTH-WC is violated on one of its two loops
    assert [(v.loop, v.verdict) for v in t.node("BOTH-WC").verdicts] == [("ax", "pass"), ("ay", "fail")]
    assert t.node("NEED-2").state == "violated"
    with pytest.raises(NotFoundError):
        t.node("NOPE")


def test_parent_with_own_metric_and_incomplete(tree):
    # a parent with its own (failing) metric is violated even when its children pass
    tree.add_requirement("AY-PM-CHILD", title="child", statement="ay wc >= 0.5",
                         metric="gain_crossover", limit=">= 0.5 rad/s", loops=["ay"],
                         parents=["AY-PM"], status="approved")
    t = build_trace(tree)
    n = t.node("AY-PM")
    assert n.own_state == "violated" and n.children[0].state == "satisfied" and n.state == "violated"
    # an unverified tip makes a requirement incomplete, and incomplete rolls up
    tree.add_revision("ax", "gain(1.1)", rationale="not verified yet", label="x2", verify=False)
    t = build_trace(tree)
    assert [(v.revision, v.verdict) for v in t.node("AX-PM").verdicts] == [("x2", "unverified")]
    assert t.node("AX-PM").state == "incomplete"
    assert t.node("NEED-1").state == "violated"   # SUB-2 still violated: worst wins
    assert t.node("NEED-2").state == "incomplete"  # BOTH-WC: ax unverified, ay pass
    gaps = {(g.requirement, g.kind, g.loop) for g in t.gaps}
    assert ("AX-PM", "unverified", "ax") in gaps and ("BOTH-WC", "unverified", "ax") in gaps


def test_gaps_and_orphans(tree):
    tree.add_loop("az", "servo")  # no revisions
    tree.add_requirement("NO-LOOP", title="no loop", statement="pm >= 30", metric="phase_margin",
                         limit=">= 30 deg", status="approved")
    tree.add_requirement("DRAFT-NO-LOOP", title="draft", statement="pm >= 30",
                         metric="phase_margin", limit=">= 30 deg", status="draft")
    tree.add_requirement("AZ-PM", title="az", statement="az pm", metric="phase_margin",
                         limit=">= 45 deg", loops=["az"], status="approved")
    tree.add_requirement("BARE", title="bare need", statement="nothing derives from it",
                         status="approved")
    tree.add_requirement("OLD", title="old need", statement="to be retired", status="approved")
    tree.add_requirement("KID", title="kid", statement="ax pm >= 40", metric="phase_margin",
                         limit=">= 40 deg", loops=["ax"], parents=["OLD", "NEED-2"],
                         status="approved")
    tree.retire_requirement("OLD", note="need dropped")
    # stale: a new requirement version not yet verified (automatic verification off)
    tree.auto_verify = False
    tree.edit_requirement("BOTH-WC", limit=">= 0.6 rad/s", note="tighter")
    t = build_trace(tree)
    gaps = {(g.requirement, g.kind, g.loop) for g in t.gaps}
    assert ("NO-LOOP", "no loop", None) in gaps
    assert not any(g.requirement == "DRAFT-NO-LOOP" for g in t.gaps)   # drafts are not gaps
    assert ("AZ-PM", "unverified", "az") in gaps
    assert ("BARE", "no evidence", None) in gaps
    assert ("BOTH-WC", "stale", "ax") in gaps and ("BOTH-WC", "stale", "ay") in gaps
    stale_gap = next(g for g in t.gaps if g.kind == "stale" and g.loop == "ax")
    assert "v1" in stale_gap.detail and "v2" in stale_gap.detail
    assert t.node("BOTH-WC").state == "incomplete" and t.node("NEED-2").state == "incomplete"
    assert t.node("NO-LOOP").state == "incomplete" and t.node("AZ-PM").state == "incomplete"
    assert [(o.requirement, o.retired_parents) for o in t.orphans] == [("KID", ("OLD",))]
    # the retired requirement is out of the tree; KID stays under its live parent NEED-2
    with pytest.raises(NotFoundError):
        t.node("OLD")
    assert "KID" in [c.key for c in t.node("NEED-2").children]
    assert "KID" not in [r.key for r in t.roots]
    # verifying clears the stale gap: ax k=1 wc 0.786 >= 0.6, ay k=2 wc 1.25 >= 0.6
    assert _wc(1.0) >= 0.6 and _wc(2.0) >= 0.6
    tree.verify(tips_only=True)
    t = build_trace(tree)
    assert not any(g.kind == "stale" for g in t.gaps)
    assert t.node("BOTH-WC").state == "satisfied"


def test_orphan_becomes_root(tree):
    tree.add_requirement("OLD", title="old", statement="old need", status="approved")
    tree.add_requirement("KID", title="kid", statement="ax pm >= 40", metric="phase_margin",
                         limit=">= 40 deg", loops=["ax"], parents=["OLD"], status="approved")
    tree.retire_requirement("OLD", note="gone")
    t = build_trace(tree)
    assert "KID" in [r.key for r in t.roots]
    assert t.node("KID").state == "satisfied"  # ax k=1: pm 51.8 >= 40 (closed form above)
    assert _pm(1.0) >= 40


def test_cli_trace(tree, monkeypatch):
    import json

    from typer.testing import CliRunner

    from ledger.cli import app

    monkeypatch.setenv("LOOPLEDGER_DB", tree.url)
    monkeypatch.setenv("COLUMNS", "200")
    tree.add_requirement("BARE", title="bare need", statement="nothing derives from it",
                         status="approved")
    runner = CliRunner()
    res = runner.invoke(app, ["trace"])
    assert res.exit_code == 0, res.output
    assert "NEED-1  [violated]" in res.output and "ay/y1: fail" in res.output
    assert "coverage gaps" in res.output and "no evidence" in res.output
    data = json.loads(runner.invoke(app, ["trace", "--json"]).output)
    need1 = next(n for n in data["tree"] if n["key"] == "NEED-1")
    sub2 = next(c for c in need1["children"] if c["key"] == "SUB-2")
    assert sub2["state"] == "violated" and sub2["own_state"] is None
    assert [c["key"] for c in sub2["children"]] == ["AX-WC", "AY-PM"]
    assert data["gaps"] == [{"requirement": "BARE", "kind": "no evidence",
                             "detail": "no metric and no requirement derived from it",
                             "loop": None, "revision": None}]
