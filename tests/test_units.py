"""Limits with units.  Reference: pint (a general-purpose units library) for dimensional
conversions; the Hz -> rad/s and dB conventions are facts of the trade."""

from __future__ import annotations

import math

import pint
import pytest
from numpy.testing import assert_allclose

from ledger.errors import UnitError
from ledger.judge import judge
from ledger.units import parse_limit

UREG = pint.UnitRegistry()


@pytest.mark.parametrize(
    "text, unit, pint_from, pint_to",
    [
        ("<= 25 ms", "s", (25, "ms"), "s"),
        ("<= 150 ms", "s", (150, "ms"), "s"),
        ("<= 800 us", "s", (800, "us"), "s"),
        ("<= 2 min", "s", (2, "min"), "s"),
        (">= 45 deg", "deg", (45, "deg"), "deg"),
        (">= 0.6 rad", "deg", (0.6, "rad"), "deg"),
        (">= 4 ms", "s", (4, "ms"), "s"),
    ],
)
def test_dimensional_conversions_match_pint(text, unit, pint_from, pint_to):
    # Source: pint's own unit definitions (reference library).
    expected = UREG.Quantity(*pint_from).to(pint_to).magnitude
    assert_allclose(parse_limit(text, unit).value, expected, rtol=1e-12)


def test_hz_is_converted_to_rad_per_s_by_two_pi():
    # Fact of the trade (common practice, no source): f [Hz] = w [rad/s] / (2 pi).  pint alone
    # would map 1 Hz to 1 rad/s because it treats the radian as dimensionless.
    assert_allclose(parse_limit(">= 30 Hz", "rad/s").value, 2 * math.pi * 30, rtol=1e-12)
    assert_allclose(parse_limit(">= 1.2 kHz", "rad/s").value, 2 * math.pi * 1200, rtol=1e-12)
    assert_allclose(parse_limit(">= 190 rad/s", "rad/s").value, 190, rtol=1e-12)


def test_db_and_ratio():
    # 20 log10 convention for magnitudes (common practice, no source): 6 dB ~ 1.995.
    assert_allclose(parse_limit("<= 6 dB", "ratio").value, 10 ** (6 / 20), rtol=1e-12)
    assert_allclose(parse_limit(">= 2 ratio", "dB").value, 20 * math.log10(2), rtol=1e-12)
    assert parse_limit("<= 1.4", "ratio").value == 1.4
    assert parse_limit("<= 12 %", "%").value == 12.0


@pytest.mark.parametrize(
    "text, unit, match",
    [
        ("<= 25 parsecs", "s", "unit"),
        ("<= 25 kg", "s", "does not fit"),
        ("<= 25", "s", "needs a unit"),
        ("<= 6 deg", "dB", "does not fit"),
        ("<= 12 s", "%", "does not fit"),
        ("about 12 %", "%", "not understood"),
        ("", "%", "limit is needed"),
        ("<= nan %", "%", "not understood"),
        ("maybe", "bool", "true or false"),
    ],
)
def test_bad_limits_are_refused(text, unit, match):
    with pytest.raises(UnitError, match=match):
        parse_limit(text, unit)


def test_judge_headroom_signs():
    lim = parse_limit(">= 45 deg", "deg")
    j = judge(lim, 50.0)
    assert j.verdict == "pass" and j.headroom == 5.0 and j.headroom_fraction == pytest.approx(5 / 45)
    assert judge(lim, 40.0).verdict == "fail" and judge(lim, 40.0).headroom == -5.0
    lim = parse_limit("<= 150 ms", "s")
    assert judge(lim, 0.1).headroom == pytest.approx(0.05)
    assert judge(parse_limit(">= 6 dB", "dB"), math.inf).headroom == math.inf
    assert judge(lim, float("nan")).verdict == "error"


def test_vectorised_judging_agrees_with_scalar():
    # Two methods: the per-value judge and the array form used over plant families.
    import numpy as np

    from ledger.judge import headroom, headroom_array, passes_array

    vals = np.array([-np.inf, -3.0, 0.0, 44.999, 45.0, 45.001, 1e9, np.inf])
    for cmp_ in ("<=", "<", ">=", ">", "=="):
        lim = parse_limit(f"{cmp_} 45 deg", "deg")
        want_h = [headroom(cmp_, float(v), 45.0) for v in vals]
        np.testing.assert_array_equal(headroom_array(cmp_, vals, 45.0), want_h)
        want_p = [judge(lim, float(v)).verdict == "pass" for v in vals]
        np.testing.assert_array_equal(passes_array(cmp_, vals, 45.0), want_p)
