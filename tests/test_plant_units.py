"""Units carried from the plant into metrics and limits.

References: pint (the units library the ledger uses; its definitions follow the SI brochure,
BIPM 9th edition, for the prefixes m, u, k and the derived units A, V, Hz, rad), and the
amplitude-ratio decibel 20 log10 (common practice, no source).
"""

from __future__ import annotations

import math

import pint
import pytest
from numpy.testing import assert_allclose

from ledger.api import open_ledger
from ledger.errors import LedgerError, UnitError
from ledger.units import parse_limit, parse_limit_for, resolve_unit

UREG = pint.UnitRegistry()


# (limit text, metric unit, pint source quantity, pint target unit) for every unit pair the
# docs offer (docs/metrics.md, "Units"); the expected value comes from pint itself.
PAIRS = [
    ("<= 20 mrad", "rad", (20, "mrad"), "rad"),
    ("<= 0.02 rad", "rad", (0.02, "rad"), "rad"),
    ("<= 1.2 deg", "rad", (1.2, "deg"), "rad"),
    ("<= 20 um", "m", (20, "um"), "m"),
    ("<= 20 um", "mm", (20, "um"), "mm"),
    ("<= 0.5 mm", "m", (0.5, "mm"), "m"),
    ("<= 3 A", "A", (3, "A"), "A"),
    ("<= 2500 mA", "A", (2500, "mA"), "A"),
    ("<= 24 V", "V", (24, "V"), "V"),
    ("<= 0.5 kV", "V", (0.5, "kV"), "V"),
    ("<= 300 mA", "mA", (300, "mA"), "mA"),
    ("<= 0.5 A/mrad", "A/rad", (0.5, "A/mrad"), "A/rad"),
    ("<= 200 ms", "s", (200, "ms"), "s"),
    ("<= 800 us", "s", (800, "us"), "s"),
    (">= 45 deg", "deg", (45, "deg"), "deg"),
    (">= 800 mrad", "deg", (800, "mrad"), "deg"),
    (">= 190 rad/s", "rad/s", (190, "rad/s"), "rad/s"),
    (">= 5 1/s", "1/s", (5, "1/s"), "1/s"),
    ("<= 1 %", "", (1, "percent"), "dimensionless"),
    ("<= 10 %", "ratio", (10, "percent"), "dimensionless"),
]


@pytest.mark.parametrize("text, unit, src, dst", PAIRS)
def test_every_offered_unit_pair_matches_pint(text, unit, src, dst):
    expected = UREG.Quantity(*src).to(dst).magnitude
    assert_allclose(parse_limit(text, unit).value, expected, rtol=1e-12)


@pytest.mark.parametrize("text, hz", [(">= 5 Hz", 5.0), (">= 1.2 kHz", 1200.0),
                                      (">= 300 mHz", 0.3)])
def test_hz_to_rad_per_s(text, hz):
    # SI brochure: 1 Hz = 1 s^-1 of cycles; angular frequency w = 2 pi f (common practice).
    assert_allclose(parse_limit(text, "rad/s").value, 2 * math.pi * hz, rtol=1e-12)


@pytest.mark.parametrize("db", [-6.0, 0.0, 3.0, 6.0, 20.0])
def test_db_of_an_amplitude_ratio(db):
    # 20 log10 for an amplitude ratio (common practice, no source)
    assert_allclose(parse_limit(f"<= {db} dB", "ratio").value, 10 ** (db / 20), rtol=1e-12)


@pytest.mark.parametrize("text, unit", [
    ("<= 3 V", "A"), ("<= 20 mrad", "mm"), ("<= 20 um", "rad"), ("<= 1 %", "rad"),
    ("<= 6 dB", "A/rad"), ("<= 3 A", ""), ("<= 5 Hz", "A"), ("<= 3 A", "ratio"),
])
def test_incompatible_units_are_refused(text, unit):
    with pytest.raises(UnitError, match="does not fit"):
        parse_limit(text, unit)


def test_resolve_unit_from_the_plant():
    assert resolve_unit("peak_effort", "", "A", "rad") == "A"
    assert resolve_unit("disturbance_peak", "", "A", "rad") == "rad"
    assert resolve_unit("ramp_error", "", "A", "mm") == "mm"
    assert resolve_unit("peak_control_sensitivity", "ratio", "A", "rad") == "A/rad"
    assert resolve_unit("peak_control_sensitivity", "ratio", "", "") == "ratio"
    assert resolve_unit("velocity_constant", "1/s", "A", "rad") == "1/s"
    assert resolve_unit("peak_effort", "", "", "") == ""


def test_refusal_names_both_units():
    with pytest.raises(UnitError, match=r"unit V does not fit peak_effort on loop 'x', "
                                        r"measured in A \(the plant's input unit\)"):
        parse_limit_for("<= 3 V", "peak_effort", "", [("x", "A", "rad")])


PLANT = "K/(s*(tau*s+1))"


@pytest.fixture
def unit_lg(tmp_path):
    lg = open_ledger(tmp_path / "u.db", create=True, author="tester")
    lg.add_plant("axis", PLANT, params={"K": 180.0, "tau": 0.03}, input_unit="A", output_unit="rad")
    lg.add_loop("axis", "axis", kind="position")
    lg.add_revision("axis", "pid(kp=0.4, ki=4, kd=0.006, tf=0.0008)", rationale="first tuning")
    yield lg
    lg.close()


def test_limits_in_plant_units_are_accepted_and_judged(unit_lg):
    lg = unit_lg
    lg.add_requirement("E-1", title="effort", statement="effort below 3 A", metric="peak_effort",
                       limit="<= 3000 mA", loops=["axis"])
    lg.add_requirement("E-2", title="effort", statement="effort below 3 A", metric="peak_effort",
                       limit="<= 3 A", loops=["axis"])
    lg.add_requirement("D-1", title="dist", statement="disturbance below 20 mrad",
                       metric="disturbance_peak", limit="<= 20 mrad", loops=["axis"])
    assert lg.requirement("E-1").limit_value == pytest.approx(3.0, rel=1e-12)
    assert lg.requirement("D-1").limit_value == pytest.approx(0.02, rel=1e-12)
    lg.verify()
    res = {r.requirement: r for r in lg.results("axis")}
    assert res["E-1"].unit == "A" and res["D-1"].unit == "rad"
    # the same limit written in mA and in A gives the same verdict and headroom (in A)
    assert res["E-1"].verdict == res["E-2"].verdict
    assert_allclose(res["E-1"].headroom, res["E-2"].headroom, rtol=1e-12)


def test_incompatible_limit_refused_and_nothing_written(unit_lg):
    lg = unit_lg
    before = lg.counts()
    for metric, limit in [("peak_effort", "<= 3 V"), ("disturbance_peak", "<= 20 mm"),
                          ("peak_effort", "<= 1 %")]:
        with pytest.raises(LedgerError, match=r"does not fit .* measured in (A|rad)"):
            lg.add_requirement("BAD", title="t", statement="s", metric=metric, limit=limit,
                               loops=["axis"])
    assert lg.counts() == before


def test_undeclared_plant_units_stay_dimensionless(tmp_path):
    lg = open_ledger(tmp_path / "n.db", create=True, author="tester")
    lg.add_plant("p", PLANT, params={"K": 180.0, "tau": 0.03})
    lg.add_loop("p", "p", kind="position")
    with pytest.raises(LedgerError, match="declares no units"):
        lg.add_requirement("E", title="t", statement="s", metric="peak_effort", limit="<= 3 A",
                           loops=["p"])
    lg.add_requirement("E", title="t", statement="s", metric="peak_effort", limit="<= 3",
                       loops=["p"])
    lg.close()


def test_unknown_plant_unit_refused(tmp_path):
    lg = open_ledger(tmp_path / "n.db", create=True, author="tester")
    with pytest.raises(LedgerError, match="not a unit pint knows"):
        lg.add_plant("p", PLANT, params={"K": 1.0, "tau": 0.03}, input_unit="zorks")
    lg.close()


def test_plant_unit_named_like_a_catalogue_unit():
    # a speed loop's output in rad/s: a bare number is in rad/s, rpm converts by pint
    # (1 rpm = 2 pi rad / 60 s), Hz is refused (no angle in it; pint would map it 1:1)
    lim = parse_limit_for("<= 0.5", "steady_state_error", "", [("sh", "V", "rad/s")])
    assert lim.value == 0.5 and lim.unit == "rad/s"
    lim = parse_limit_for("<= 5 rpm", "steady_state_error", "", [("sh", "V", "rad/s")])
    assert_allclose(lim.value, UREG.Quantity(5, "rpm").to("rad/s").magnitude, rtol=1e-12)
    with pytest.raises(UnitError, match="does not fit"):
        parse_limit_for("<= 5 Hz", "steady_state_error", "", [("sh", "V", "rad/s")])


def test_an_old_plant_unit_pint_does_not_know():
    # recorded before plant units were checked: a bare number still works, a unit is refused
    # with a reason (never a crash) and a value is shown in that unit
    from ledger.display import value_text

    assert parse_limit_for("<= 40", "peak_effort", "", [("x", "zorks", "")]).value == 40
    with pytest.raises(UnitError, match="cannot be converted"):
        parse_limit_for("<= 40 A", "peak_effort", "", [("x", "zorks", "")])
    assert value_text(12.0, "zorks", "<= 40") == "12 zorks"
    assert value_text(12.0, "zorks", "<= 40 A") == "12 zorks"


@pytest.mark.parametrize("bad", ["A]", "(m", "m)", "V**", "1/"])
def test_unparsable_unit_text_is_a_one_line_refusal(bad):
    # pint's tokenizer and parser raise TokenError / AssertionError on such text
    from ledger.units import check_plant_unit

    with pytest.raises(UnitError):
        check_plant_unit(bad)
    with pytest.raises(UnitError):
        parse_limit(f"<= 3 {bad}", "A", signal=True)
    with pytest.raises(UnitError):
        parse_limit(f"<= 3 {bad}", "s")
