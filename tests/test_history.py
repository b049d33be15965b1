"""Regressions between revisions (ledger.history.diff) and the first failing revision
(ledger.history.since)."""

from __future__ import annotations

import math
from datetime import datetime, timezone

import pytest
from numpy.testing import assert_allclose

from ledger.errors import NotFoundError, SpecError
from ledger.history.diff import CLASSES, classify, classify_pair, diff
from ledger.history.since import first_failing
from ledger.records import ResultInfo

T0 = datetime(2026, 1, 1, tzinfo=timezone.utc)


def _res(key="R-1", verdict="pass", value=50.0, limit=45.0, *, headroom=None, unit="deg",
         rv=1, pv=1, stale=False, worst="nominal", reason=""):
    """A hand-made result for a '>= limit' requirement (headroom = value - limit)."""
    if headroom is None and value is not None:
        headroom = value - limit
    return ResultInfo(loop="L", revision="r", requirement=key, requirement_version=rv,
                      plant_version=pv, verdict=verdict, value=value, unit=unit,
                      limit_text=f">= {limit} {unit}", headroom=headroom,
                      headroom_fraction=None if headroom is None else headroom / limit,
                      worst_variant=worst, pass_fraction=1.0, variants=1, reason=reason,
                      engine_version="t", created_at=T0, stale=stale)


# -- classes on hand-made results --------------------------------------------------------
# Source for every class: the regression classes of docs/history.md (our own
# definitions: broke pass->fail, fixed fail->pass, eroded/improved beyond a fraction of the
# older headroom); expected values below are plain arithmetic on the inputs.

@pytest.mark.parametrize("old_v, new_v, expected", [
    ("pass", "fail", "broke"),
    ("pass", "error", "broke"),      # error counts as not passing
    ("fail", "pass", "fixed"),
    ("error", "pass", "fixed"),
    ("fail", "fail", "unchanged"),
    ("error", "fail", "unchanged"),
    ("fail", "error", "unchanged"),
])
def test_verdict_transitions(old_v, new_v, expected):
    old = _res(verdict=old_v, value=50.0 if old_v == "pass" else 40.0)
    new = _res(verdict=new_v, value=50.0 if new_v == "pass" else 40.0)
    c = classify_pair(old, new)
    assert c.kind == expected
    assert (c.old_verdict, c.new_verdict) == (old_v, new_v)


def test_threshold_edge_belongs_to_unchanged():
    # older headroom 4 deg, threshold 0.25 -> edge at a change of exactly 1 deg (arithmetic).
    old = _res(value=49.0)                                   # headroom 4
    at_edge_down = classify_pair(old, _res(value=48.0))      # headroom 3: delta -1 exactly
    past_edge_down = classify_pair(old, _res(value=47.99))   # delta -1.01
    at_edge_up = classify_pair(old, _res(value=50.0))        # headroom 5: delta +1 exactly
    past_edge_up = classify_pair(old, _res(value=50.01))
    assert at_edge_down.kind == "unchanged"
    assert past_edge_down.kind == "eroded"
    assert at_edge_up.kind == "unchanged"
    assert past_edge_up.kind == "improved"
    assert_allclose(at_edge_down.headroom_delta, -1.0, rtol=1e-12)
    assert_allclose(at_edge_down.headroom_change, -0.25, rtol=1e-12)
    assert_allclose(past_edge_down.headroom_change, -1.01 / 4, rtol=1e-9)
    assert_allclose(past_edge_up.value_delta, 1.01, rtol=1e-9)


def test_threshold_edge_with_decimal_rounding():
    # 0.4 -> 0.3 is exactly 25 % of 0.4 in decimal; in binary 0.3 - 0.4 = -0.10000000000000003.
    # The edge tolerance (edge_rtol=1e-9) puts it on the edge; a tolerance of 0 does not.
    old = _res(value=45.4, headroom=0.4)
    new = _res(value=45.3, headroom=0.3)
    assert classify_pair(old, new, 0.25).kind == "unchanged"
    assert classify_pair(old, new, 0.25, edge_rtol=0.0).kind == "eroded"


def test_threshold_is_configurable():
    old, new = _res(value=55.0), _res(value=52.0)  # headroom 10 -> 7: 30 % less
    assert classify_pair(old, new, 0.25).kind == "eroded"
    assert classify_pair(old, new, 0.30).kind == "unchanged"   # exactly at the edge
    assert classify_pair(old, new, 0.5).kind == "unchanged"
    assert classify_pair(old, new, 0.0).kind == "eroded"      # any loss with threshold 0
    with pytest.raises(SpecError, match="threshold"):
        classify_pair(old, new, -0.1)
    with pytest.raises(SpecError, match="threshold"):
        classify_pair(old, new, math.inf)


def test_infinite_headroom():
    # A gain margin of inf (no phase crossover, e.g. k/(s(s+1)); common practice, no source).
    inf_old = _res(key="GM", value=math.inf, limit=6.0, unit="dB")
    fin = _res(key="GM", value=20.0, limit=6.0, unit="dB")
    inf_new = _res(key="GM", value=math.inf, limit=6.0, unit="dB")
    c = classify_pair(inf_old, fin)
    assert c.kind == "eroded" and c.headroom_delta == -math.inf and c.headroom_change is None
    c = classify_pair(fin, inf_new)
    assert c.kind == "improved" and c.headroom_delta == math.inf
    c = classify_pair(inf_old, inf_new)
    assert c.kind == "unchanged" and c.headroom_delta is None and c.value_delta is None
    # never NaN anywhere in a Change
    for ch in (classify_pair(inf_old, fin), classify_pair(fin, inf_new), classify_pair(inf_old, inf_new)):
        for v in vars(ch).values():
            assert not (isinstance(v, float) and math.isnan(v))
    # infinite to a failing value is still 'broke'
    assert classify_pair(inf_old, _res(key="GM", verdict="fail", value=3.0, limit=6.0)).kind == "broke"


def test_zero_headroom():
    at_limit = _res(value=45.0)                     # passes '>= 45' with headroom 0
    assert classify_pair(at_limit, _res(value=45.0)).kind == "unchanged"
    assert classify_pair(at_limit, _res(value=45.001)).kind == "improved"
    assert classify_pair(at_limit, _res(verdict="fail", value=44.9)).kind == "broke"
    assert classify_pair(at_limit, _res(value=46.0)).headroom_change is None  # / 0 undefined
    # to zero: lost all of 4 deg (100 %) -> eroded
    assert classify_pair(_res(value=49.0), at_limit).kind == "eroded"


def test_new_dropped_stale_and_versions():
    a1, b1 = _res("A"), _res("B")
    a2, c2 = _res("A"), _res("C")
    ch = {c.requirement: c for c in classify([a1, b1], [a2, c2])}
    assert ch["B"].kind == "dropped" and ch["B"].new_verdict is None
    assert ch["C"].kind == "new" and ch["C"].old_verdict is None
    assert ch["A"].kind == "unchanged"
    stale = _res("A", verdict="stale", stale=True)
    c = classify_pair(a1, stale)
    assert c.kind == "incomparable" and "stale" in c.note and "newer" in c.note
    c = classify_pair(_res("A", rv=1), _res("A", rv=2, verdict="fail", value=40.0))
    assert c.kind == "incomparable" and "v1" in c.note and "v2" in c.note
    assert (c.old_requirement_version, c.new_requirement_version) == (1, 2)
    c = classify_pair(_res("A", pv=1), _res("A", pv=3))
    assert c.kind == "incomparable" and "plant v3" in c.note
    with pytest.raises(SpecError, match="twice"):
        classify([a1, a1], [a2])


def test_order_and_fields():
    old = [_res("Z", value=50.0, worst="heavy"), _res("A", value=60.0), _res("M", verdict="fail", value=40.0)]
    new = [_res("Z", verdict="fail", value=40.0, worst="light"), _res("A", value=46.0),
           _res("M", value=47.0)]
    out = classify(old, new)
    assert [c.kind for c in out] == ["broke", "eroded", "fixed"]
    assert [c.requirement for c in out] == ["Z", "A", "M"]
    z = out[0]
    assert (z.old_worst_variant, z.new_worst_variant) == ("heavy", "light")
    assert_allclose([z.old_value, z.new_value, z.value_delta], [50.0, 40.0, -10.0], rtol=1e-12)
    assert list(CLASSES[:2]) == ["broke", "eroded"]


# -- diff on a real ledger with a closed-form loop ----------------------------------------
def _pm_closed_form(k: float) -> tuple[float, float]:
    """Phase margin (deg) and gain crossover (rad/s) of L = k/(s(s+1)).

    |L(jw)| = 1  <=>  w^4 + w^2 - k^2 = 0  =>  wc^2 = (sqrt(1 + 4k^2) - 1)/2, and
    arg L(jwc) = -90 deg - atan(wc)  =>  pm = 90 deg - atan(wc).
    Source: derived here from the definitions (any feedback-control textbook's phase-margin
    definition, e.g. Franklin, Powell & Emami-Naeini, 'Feedback Control of Dynamic Systems').
    """
    wc = math.sqrt((math.sqrt(1.0 + 4.0 * k * k) - 1.0) / 2.0)
    return 90.0 - math.degrees(math.atan(wc)), wc


@pytest.fixture(scope="module")
def kloop(tmp_path_factory):
    from ledger.api import open_ledger

    path = tmp_path_factory.mktemp("hist") / "k.db"
    lg = open_ledger(path, create=True, author="tester")
    lg.add_plant("servo", "1/(s*(s+1))")
    lg.add_loop("ax", "servo")
    lg.add_requirement("PM", title="phase margin", statement="PM >= 45 deg",
                       metric="phase_margin", limit=">= 45 deg", loops=["ax"], status="approved")
    lg.add_requirement("WC", title="speed", statement="crossover >= 0.5 rad/s",
                       metric="gain_crossover", limit=">= 0.5 rad/s", loops=["ax"], status="draft")
    lg.add_requirement("GM", title="gain margin", statement="GM >= 6 dB",
                       metric="gain_margin", limit=">= 6 dB", loops=["ax"], status="approved")
    # lineage: r1 (k=0.5) -> r2 (k=1) -> r3 (k=2) -> r4 (k=2.5)
    #                      \-> b1 (k=0.6, branch from r1)
    lg.add_revision("ax", "gain(0.5)", rationale="gentle first tuning", label="r1")
    lg.add_revision("ax", "gain(1)", rationale="faster", label="r2")
    lg.add_revision("ax", "gain(2)", rationale="faster still for settling", label="r3")
    lg.add_revision("ax", "gain(2.5)", rationale="more gain", label="r4")
    lg.add_revision("ax", "gain(0.6)", rationale="cautious branch", parent="r1", label="b1")
    yield lg
    lg.close()


def test_closed_form_values_are_what_the_ledger_holds(kloop):
    for label, k in (("r1", 0.5), ("r2", 1.0), ("r3", 2.0), ("r4", 2.5), ("b1", 0.6)):
        res = {r.requirement: r for r in kloop.results("ax", label)}
        pm, wc = _pm_closed_form(k)
        # Target (docs/performance.md, family sweep): closed-form cases agree to 1e-6 relative.
        assert_allclose(res["PM"].value, pm, rtol=1e-6)
        assert_allclose(res["WC"].value, wc, rtol=1e-6)
        # arg L = -90 deg - atan(w) > -180 deg for every finite w: no phase crossover, GM = inf
        # (derived here from the same closed form).
        assert res["GM"].value == math.inf


def test_diff_parent_child_eroded_and_fixed(kloop):
    pm1, wc1 = _pm_closed_form(0.5)
    pm2, wc2 = _pm_closed_form(1.0)
    # headroom 20.53 -> 6.83 deg: a loss of 67 % > 25 %, so eroded; crossover 0.455 -> 0.786
    d = diff(kloop, "ax", "r2")
    assert d.old.label == "r1" and d.new.label == "r2"
    ch = {c.requirement: c for c in d.changes}
    assert (pm2 - 45) - (pm1 - 45) < -0.25 * (pm1 - 45)
    assert ch["PM"].kind == "eroded"
    assert_allclose(ch["PM"].headroom_delta, pm2 - pm1, rtol=1e-6)
    assert_allclose(ch["PM"].headroom_change, (pm2 - pm1) / (pm1 - 45), rtol=1e-6)
    assert ch["WC"].kind == "fixed" and wc1 < 0.5 <= wc2
    assert ch["GM"].kind == "unchanged" and ch["GM"].headroom_delta is None
    assert ch["PM"].status == "approved" and ch["WC"].status == "draft"
    assert [c.requirement for c in d.changes][:2] == ["PM", "WC"]  # eroded before fixed


def test_diff_tip_breaks_margin(kloop):
    pm2, _ = _pm_closed_form(1.0)
    pm3, _ = _pm_closed_form(2.0)
    assert pm2 >= 45 > pm3  # closed form: the higher gain breaks the 45 deg margin
    d = diff(kloop, "ax", "r3")
    c = {c.requirement: c for c in d.changes}["PM"]
    assert c.kind == "broke" and (c.old_verdict, c.new_verdict) == ("pass", "fail")
    assert_allclose([c.old_value, c.new_value], [pm2, pm3], rtol=1e-6)
    assert d.regressions == (c,)


def test_diff_across_branches_and_threshold(kloop):
    pm1, _ = _pm_closed_form(0.5)
    pmb, _ = _pm_closed_form(0.6)
    loss = ((pm1 - 45) - (pmb - 45)) / (pm1 - 45)     # about 0.17
    d = diff(kloop, "ax", "b1")                       # default parent r1
    assert d.old.label == "r1"
    assert {c.requirement: c for c in d.changes}["PM"].kind == "unchanged"
    d = diff(kloop, "ax", "b1", threshold=loss * 0.9)
    assert {c.requirement: c for c in d.changes}["PM"].kind == "eroded"
    d = diff(kloop, "ax", "b1", "r3")                 # any two revisions, across branches
    c = {c.requirement: c for c in d.changes}["PM"]
    assert c.kind == "fixed"
    root = diff(kloop, "ax", "r1")
    assert root.old is None and {c.kind for c in root.changes} == {"new"}
    with pytest.raises(NotFoundError):
        diff(kloop, "ax", "nope")


# -- first failing revision on a branching lineage ----------------------------------------
def test_first_failing_branching(kloop):
    # PM verdicts from the closed form: r1 pass, r2 pass, r3 fail, r4 fail, b1 pass
    run = first_failing(kloop, "ax", "PM")            # default: the tip (latest recorded)
    assert run.label == kloop.revision("ax").label and run.state == "passes"  # k <= 0.6 there
    run = first_failing(kloop, "ax", "PM", "r4")
    assert run.state == "failing" and run.first.label == "r3" and run.run == ("r3", "r4")
    assert run.boundary.label == "r2" and run.boundary_verdict == "pass" and run.certain
    assert not run.since_root
    assert "faster still for settling" in run.summary()
    # WC fails on r1 (the root), passes from r2 on: failing since the root on r1 alone
    run = first_failing(kloop, "ax", "WC", "r1")
    assert run.state == "failing" and run.since_root and run.first.label == "r1"
    assert "since the root" in run.summary()
    # on the branch b1 (k = 0.6, wc = 0.53 > 0.5) WC passes
    assert first_failing(kloop, "ax", "WC", "b1").state == "passes"
    with pytest.raises(NotFoundError):
        first_failing(kloop, "ax", "NOPE")


def test_first_failing_stops_at_unverified(tmp_path):
    from ledger.api import open_ledger

    with open_ledger(tmp_path / "u.db", create=True, author="t") as lg:
        lg.add_plant("servo", "1/(s*(s+1))")
        lg.add_loop("ax", "servo")
        lg.add_requirement("PM", title="pm", statement="PM >= 45 deg", metric="phase_margin",
                           limit=">= 45 deg", loops=["ax"], status="approved")
        lg.add_revision("ax", "gain(3)", rationale="root, fails", label="a")
        lg.add_revision("ax", "gain(2.5)", rationale="not verified", label="b", verify=False)
        lg.add_revision("ax", "gain(2)", rationale="fails", label="c")
        lg.add_revision("ax", "gain(4)", rationale="fails more", label="d")
        run = first_failing(lg, "ax", "PM")
        assert run.label == "d" and run.first.label == "c" and run.run == ("c", "d")
        assert run.boundary.label == "b" and run.boundary_verdict == "unverified"
        assert not run.certain and "verify" in run.summary()
        assert first_failing(lg, "ax", "PM", "b").state == "unknown"
        # diff with an unverified side: dropped / new, and the note says to verify
        d = diff(lg, "ax", "b")
        (c,) = d.changes
        assert c.kind == "dropped" and "not verified on b" in c.note
        (c,) = diff(lg, "ax", "c").changes
        assert c.kind == "new" and "not verified on b" in c.note
        lg.verify("ax")
        run = first_failing(lg, "ax", "PM")
        assert run.first.label == "a" and run.since_root and run.certain
        assert run.run == ("a", "b", "c", "d")


# -- command line ---------------------------------------------------------------------------
@pytest.fixture
def cli(kloop, monkeypatch):
    import json

    from typer.testing import CliRunner

    from ledger.cli import app

    monkeypatch.setenv("LOOPLEDGER_DB", kloop.url)
    monkeypatch.setenv("COLUMNS", "200")
    runner = CliRunner()

    def call(*args):
        return runner.invoke(app, list(args))

    call.json = lambda *a: json.loads(call(*a).output)
    return call


def test_cli_diff_exit_codes(cli):
    # r2 -> r3: approved PM broke (closed form 51.8 -> 38.7 deg)
    res = cli("diff", "ax", "r3")
    assert res.exit_code == 0, res.output
    assert "BROKE" in res.output and "PM" in res.output
    assert cli("diff", "ax", "r3", "--exit-on", "broke").exit_code == 3
    assert cli("diff", "ax", "r3", "--exit-on", "approved-broke").exit_code == 3
    # r1 -> r2: PM eroded, draft WC fixed; nothing broke
    assert cli("diff", "ax", "r2", "--exit-on", "broke").exit_code == 0
    assert cli("diff", "ax", "r2", "--exit-on", "any").exit_code == 3
    data = cli.json("diff", "ax", "r2", "--json")
    kinds = {c["requirement"]: c["kind"] for c in data["changes"]}
    assert kinds == {"PM": "eroded", "WC": "fixed", "GM": "unchanged"}
    assert data["old"] == "r1" and data["counts"]["eroded"] == 1
    gm = next(c for c in data["changes"] if c["requirement"] == "GM")
    assert gm["old_value"] == "inf" and gm["headroom_delta"] is None
    bad = cli("diff", "ax", "nope")
    assert bad.exit_code == 1 and "nope" in bad.output


def test_cli_approved_broke_ignores_drafts(cli, kloop):
    # WC (a draft) breaks from r2 (k=1, wc 0.786) to a k=0.4 branch (wc 0.37 < 0.5, closed form)
    wc = math.sqrt((math.sqrt(1 + 4 * 0.4 ** 2) - 1) / 2)
    assert wc < 0.5
    kloop.add_revision("ax", "gain(0.4)", rationale="slow branch", parent="r2", label="s1")
    d = diff(kloop, "ax", "s1")
    assert {c.requirement: c.kind for c in d.changes}["WC"] == "broke"
    assert not [c for c in d.of("broke") if c.status == "approved"]
    assert cli("diff", "ax", "s1", "--exit-on", "approved-broke").exit_code == 0
    assert cli("diff", "ax", "s1", "--exit-on", "broke").exit_code == 3


def test_cli_since_and_print_regressions(cli, kloop, capsys):
    res = cli("since", "ax", "PM", "r4")
    assert res.exit_code == 0, res.output
    assert "began at r3" in res.output and "faster still for settling" in res.output
    data = cli.json("since", "ax", "PM", "r4", "--json")
    assert data["first"] == "r3" and data["run"] == ["r3", "r4"] and data["certain"] is True

    from ledger.cli.history import print_regressions

    d = print_regressions(kloop, "ax", "r3")
    out = capsys.readouterr().out
    assert d.of("broke") and "BROKE" in out and "against parent r2" in out
    print_regressions(kloop, "ax", "r1")
    assert "root revision" in capsys.readouterr().out


def test_diff_after_requirement_edit_is_incomparable(tmp_path):
    from ledger.api import open_ledger

    with open_ledger(tmp_path / "e.db", create=True, author="t") as lg:
        lg.add_plant("servo", "1/(s*(s+1))")
        lg.add_loop("ax", "servo")
        lg.add_requirement("PM", title="pm", statement="PM >= 45 deg", metric="phase_margin",
                           limit=">= 45 deg", loops=["ax"], status="approved")
        lg.add_revision("ax", "gain(0.5)", rationale="first", label="a")
        lg.add_revision("ax", "gain(1)", rationale="second", label="b")
        # a new requirement version verified on the tip only (automatic verification off, then
        # the tip verified by hand): the parent's result is stale
        lg.auto_verify = False
        lg.edit_requirement("PM", limit=">= 50 deg", note="tighter")
        lg.verify("ax", tips_only=True)
        (c,) = diff(lg, "ax").changes
        assert c.kind == "incomparable" and "older" in c.note and "newer" not in c.note
        assert (c.old_verdict, c.new_verdict) == ("stale", "pass")   # closed form pm(1) = 51.8
        assert _pm_closed_form(1.0)[0] >= 50
        lg.verify("ax")
        (c,) = diff(lg, "ax").changes
        assert c.kind == "eroded" and c.new_requirement_version == 2 == c.old_requirement_version
        pm_a, pm_b = _pm_closed_form(0.5)[0], _pm_closed_form(1.0)[0]
        assert_allclose(c.headroom_delta, pm_b - pm_a, rtol=1e-6)
        assert (pm_b - pm_a) < -0.25 * (pm_a - 50)
        # with automatic verification a limit edit re-judges both revisions from the cache, so
        # they stay comparable (issue 10, item 7)
        lg.auto_verify = True
        lg.edit_requirement("PM", limit=">= 49 deg")
        (c,) = diff(lg, "ax").changes
        assert c.kind == "eroded" and c.new_requirement_version == 3 == c.old_requirement_version
        assert (pm_b - pm_a) < -0.25 * (pm_a - 49)


# -- issue 10, item 7: large moves among failures; booleans without threshold notes ---------
# Expected classes are arithmetic on the inputs against our own definitions (docs/history.md):
# fail -> fail is 'moved' when |new headroom - old headroom| > threshold x |old headroom|.

def test_failure_that_moves_a_lot_is_shown_as_moved():
    # phase margin -157 deg -> 36 deg against ">= 45 deg": headroom -202 -> -9 deg, a move of
    # 193 deg, beyond 0.25 x 202 = 50.5 deg
    c = classify_pair(_res(verdict="fail", value=-157.0), _res(verdict="fail", value=36.0))
    assert c.kind == "moved" and "closer" in c.note
    assert_allclose([c.headroom_delta, c.value_delta], [193.0, 193.0], rtol=1e-12)
    # and the other way round: further from the limit
    back = classify_pair(_res(verdict="fail", value=36.0), _res(verdict="fail", value=-157.0))
    assert back.kind == "moved" and "further" in back.note
    assert not c.is_regression and not back.is_regression
    # a small move stays unchanged: headroom -9 -> -8 deg, 1 deg < 0.25 x 9 = 2.25 deg
    small = classify_pair(_res(verdict="fail", value=36.0), _res(verdict="fail", value=37.0))
    assert small.kind == "unchanged" and small.note == "still not passing"
    # exactly at the threshold stays unchanged: headroom -4 -> -3 deg, 1 = 0.25 x 4
    edge = classify_pair(_res(verdict="fail", value=41.0), _res(verdict="fail", value=42.0))
    assert edge.kind == "unchanged"
    # the class is listed among the others, after improved and before new
    assert CLASSES.index("improved") < CLASSES.index("moved") < CLASSES.index("new")


def test_boolean_metric_never_gets_a_threshold_note():
    # 'stable' judged '== 1': pass gives headroom -0.0 on both sides (ledger.judge); there is no
    # threshold to be at, so no note
    old = _res("S01", value=1.0, limit=1.0, headroom=-0.0, unit="bool")
    new = _res("S01", value=1.0, limit=1.0, headroom=-0.0, unit="bool")
    c = classify_pair(old, new)
    assert c.kind == "unchanged" and c.note == ""
    # failing on both sides is never 'moved' for a boolean
    f = classify_pair(_res("S01", verdict="fail", value=0.0, limit=1.0, headroom=-1.0, unit="bool"),
                      _res("S01", verdict="fail", value=0.0, limit=1.0, headroom=-1.0, unit="bool"))
    assert f.kind == "unchanged" and f.note == "still not passing"
    # a passing real-valued requirement that did not move gets no note either (0 -> 0 headroom)
    z = classify_pair(_res(value=45.0), _res(value=45.0))
    assert z.kind == "unchanged" and z.note == ""


def test_cli_rows_show_moved_with_its_change():
    # the CLI table row of a moved failure names the class and the headroom change
    # (193 / 202 = +96 %, arithmetic)
    from ledger.cli.history import diff_rows

    c = classify_pair(_res(verdict="fail", value=-157.0), _res(verdict="fail", value=36.0))
    row = diff_rows([c])[0]
    assert row[1] == "moved" and row[2] == "fail -> fail"
    assert "+96%" in row[6] and "closer" in row[-1]
