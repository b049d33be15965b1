"""A revision's own prefilter (reference shaping / feedforward) and anti-windup: stored, hashed,
shown, diffed, exported; the revision's prefilter takes precedence over the loop's (issue 16
item 1).

Numeric source: the steady-state actuating error of a type-0 loop for a step of r through a
prefilter F, e_ss = A F(0) / (1 + Kp) (final-value theorem; Ogata, "Modern Control
Engineering", sec. 5-8, from memory).
"""

from __future__ import annotations

import sqlite3

import pytest
from numpy.testing import assert_allclose

from ledger.api import open_ledger
from ledger.audit import audit
from ledger.errors import LedgerError
from ledger.history.diff import diff


@pytest.fixture()
def lg(tmp_path):
    with open_ledger(tmp_path / "ff.db", create=True, author="tester") as lg:
        lg.add_plant("p", "1/(s+1)")
        lg.add_loop("ax", "p", prefilter="2")
        lg.add_requirement("SSE", title="error", statement="small step error",
                           metric="steady_state_error", limit="<= 0.3", loops=["ax"])
        yield lg


def test_revision_prefilter_takes_precedence(lg):
    lg.add_revision("ax", "gain(4)", rationale="loop prefilter only", label="a")
    lg.add_revision("ax", "gain(4)", rationale="own prefilter", label="b",
                    prefilter="0.5/(0.1*s+1)")
    va = lg.results("ax", "a")[0]
    vb = lg.results("ax", "b")[0]
    # e_ss = F(0)/(1 + 4): loop's F(0) = 2 -> 0.4 (fails <= 0.3); revision's F(0) = 0.5 -> 0.1
    assert_allclose(va.value, 2 / 5, rtol=1e-12)
    assert_allclose(vb.value, 0.5 / 5, rtol=1e-12)
    assert (va.verdict, vb.verdict) == ("fail", "pass")
    d = diff(lg, "ax", "b", "a")
    assert d.design_changes == (("prefilter", "(loop's)", "0.5/(0.1*s+1)"),)
    assert [c.kind for c in d.changes] == ["fixed"]


def test_prefilter_and_anti_windup_in_the_hash_and_audit(lg, tmp_path):
    a = lg.add_revision("ax", "gain(4)", rationale="same", label="a", verify=False)
    b = lg.add_revision("ax", "gain(4)", rationale="same", label="b", parent=None,
                        verify=False, anti_windup="back-calculation", anti_windup_gain=30)
    c = lg.add_revision("ax", "gain(4)", rationale="same", label="c", parent=None,
                        verify=False, prefilter="1/(0.1*s+1)")
    assert len({a.content_hash, b.content_hash, c.content_hash}) == 3
    assert (b.anti_windup, b.anti_windup_gain, c.prefilter) == ("back-calculation", 30.0,
                                                               "1/(0.1*s+1)")
    assert audit(lg).ok
    # the same label with the same content is left as it is; other content is refused
    again = lg.add_revision("ax", "gain(4)", rationale="same", label="c", parent=None,
                            verify=False, prefilter="1/(0.1*s+1)")
    assert again.content_hash == c.content_hash
    with pytest.raises(LedgerError, match="other content"):
        lg.add_revision("ax", "gain(4)", rationale="same", label="c", parent=None,
                        verify=False, prefilter="1/(0.2*s+1)")
    # an edited prefilter is named by the audit (content hash and chain)
    db = sqlite3.connect(tmp_path / "ff.db")
    with db:
        db.execute("UPDATE revision SET prefilter_canonical = 'x', prefilter_text = 'x' "
                   "WHERE label = 'c'")
    db.close()
    rep = audit(lg)
    assert not rep.ok
    assert any(f.kind == "revision" for f in rep.findings)


def test_bad_design_fields_are_refused(lg):
    with pytest.raises(LedgerError, match="anti-windup 'wind' is not one of"):
        lg.add_revision("ax", "gain(1)", rationale="x", anti_windup="wind")
    with pytest.raises(LedgerError, match="needs a gain"):
        lg.add_revision("ax", "gain(1)", rationale="x", anti_windup="back-calculation")
    with pytest.raises(LedgerError, match="only for back-calculation"):
        lg.add_revision("ax", "gain(1)", rationale="x", anti_windup="clamping",
                        anti_windup_gain=3)
    with pytest.raises(LedgerError, match="prefilter"):
        lg.add_revision("ax", "gain(1)", rationale="x", prefilter="1/(s+")
    assert lg.revisions("ax") == []


def test_spec_round_trip_keeps_design(lg, tmp_path):
    from ledger.spec import export_spec, import_spec

    lg.add_revision("ax", "pid(kp=2, ki=1, kd=0, tf=0.01)", rationale="pi", label="a",
                    verify=False, prefilter="1/(0.05*s+1)", anti_windup="clamping")
    path = export_spec(lg, tmp_path / "out.toml")
    text = path.read_text()
    assert 'prefilter = "1/(0.05*s+1)"' in text and 'anti_windup = "clamping"' in text
    with open_ledger(tmp_path / "copy.db", create=True, author="t") as other:
        import_spec(other, path)
        r = other.revision("ax", "a")
        assert (r.prefilter, r.anti_windup, r.anti_windup_gain) == ("1/(0.05*s+1)",
                                                                   "clamping", None)


# --------------------------------------------------------------------------- large moves
# Source of the numbers: the engine's own large-move simulation, itself checked against
# closed forms and solve_ivp in tests/test_moves.py; here the ledger's side is under test (the
# move amplitude read in the plant's unit, the revision's prefilter, the diff).

_PLANT = "400/(s*(0.02*s+1))"           # belt axis, mm per A
_LEAD = "0.5*(s+15)/(15*(s/300+1))"


@pytest.fixture()
def axis(tmp_path):
    with open_ledger(tmp_path / "mv.db", create=True, author="tester") as lg:
        lg.add_plant("belt", _PLANT, input_unit="A", output_unit="mm")
        lg.add_loop("x", "belt", actuator_limit=2.0)
        lg.add_requirement("MV", title="move", statement="a 10 mm move settles in 250 ms",
                           metric="move_settling_time", limit="<= 250 ms",
                           settings={"move": "10 mm"}, loops=["x"])
        yield lg


def test_feedforward_meets_a_move_the_feedback_only_revision_misses(axis):
    import control

    from ledger.engine import measure

    axis.add_revision("x", _LEAD, rationale="lead compensator only", label="fb")
    axis.add_revision("x", _LEAD, rationale="shape the reference: no saturation", label="ff",
                      prefilter="1/(0.03*s+1)^2")
    fb, ff = axis.results("x", "fb")[0], axis.results("x", "ff")[0]
    assert (fb.verdict, ff.verdict) == ("fail", "pass")
    # the ledger's values are the engine's for the move in the plant's unit (10 mm = 10)
    s = control.tf("s")
    G = 400 / (s * (0.02 * s + 1))
    C = 0.5 * (s + 15) / (15 * (s / 300 + 1))
    ref = measure(G, C, ["move_settling_time"], actuator_limit=2.0, move=10.0)
    assert_allclose(fb.value, ref["move_settling_time"], rtol=1e-9)
    ref_ff = measure(G, C, ["move_settling_time"], actuator_limit=2.0, move=10.0,
                     prefilter=1 / (0.03 * s + 1) ** 2)
    assert_allclose(ff.value, ref_ff["move_settling_time"], rtol=1e-9)
    d = diff(axis, "x", "ff", "fb")
    assert d.design_changes == (("prefilter", "(loop's)", "1/(0.03*s+1)^2"),)
    assert [(c.requirement, c.kind) for c in d.changes] == [("MV", "fixed")]


def test_move_amplitude_units(axis):
    # 1 cm is 10 mm (pint): the same value; an angle does not fit a plant in mm
    axis.add_revision("x", _LEAD, rationale="lead", label="fb")
    v_mm = axis.results("x", "fb")[0].value
    axis.edit_requirement("MV", settings={"move": "1 cm"})
    axis.verify("x")
    r = axis.results("x", "fb")[0]
    assert r.requirement_version == 2
    assert_allclose(r.value, v_mm, rtol=1e-12)
    with pytest.raises(LedgerError, match="does not fit"):
        axis.add_requirement("MV2", title="m", statement="s", metric="move_overshoot",
                             limit="<= 5 %", settings={"move": "10 mrad"}, loops=["x"])
