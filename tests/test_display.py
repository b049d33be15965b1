"""Values shown in the limit's unit (ledger.display).

Expected texts are worked by hand from the SI prefixes (SI brochure, BIPM 9th edition:
m = 1e-3, u = 1e-6, k = 1e3), 1 Hz = 2 pi rad/s for an angular frequency, 1 deg = pi/180 rad,
and the amplitude-ratio decibel 20 log10 (common practice, no source); 4 significant digits.
"""

from __future__ import annotations

import math

import pytest

from ledger import display
from ledger.display import delta_text, headroom_delta_text, headroom_text, value_text
from ledger.judge import judge
from ledger.units import parse_limit

# (value in the metric's unit, metric unit, limit text) -> shown value
VALUES = [
    (0.145134, "s", "<= 200 ms", "145.1 ms"),
    (0.145134, "s", "<= 0.2 s", "0.1451 s"),
    (0.000232, "s", "<= 800 us", "232 us"),
    (0.232, "s", "<= 150 ms", "232 ms"),
    (2 * math.pi * 7.915, "rad/s", ">= 5 Hz", "7.915 Hz"),
    (49.73, "rad/s", ">= 30 rad/s", "49.73 rad/s"),
    (2 * math.pi * 1234.4, "rad/s", ">= 1 kHz", "1.234 kHz"),
    (1.615, "ratio", "<= 6 dB", "4.163 dB"),                       # 20 log10 1.615 = 4.16346
    (1.615, "ratio", "<= 2", "1.615"),
    (10 ** (6.02 / 20), "ratio", "<= 2 ratio", "2"),                # 1.99986
    (6.0206, "dB", ">= 2 ratio", "2"),                             # 10^(6.0206/20) = 2.0000
    (45.0, "deg", ">= 800 mrad", "785.4 mrad"),                    # 45 deg = pi/4 rad
    (0.0169, "rad", "<= 20 mrad", "16.9 mrad"),
    (1.6974, "A", "<= 2500 mA", "1697 mA"),
    (1.6974, "A", "<= 2.5", "1.697 A"),                            # bare number: plant unit
    (2.3e-5, "m", "<= 20 um", "23 um"),
    (12.5, "%", "<= 25 %", "12.5 %"),
    (0.012, "", "<= 1 %", "1.2 %"),
    (math.inf, "dB", ">= 6 dB", "inf dB"),
    (None, "s", "<= 200 ms", "-"),
]


@pytest.mark.parametrize("value, unit, limit, shown", VALUES)
def test_value_in_the_limits_unit(value, unit, limit, shown):
    assert value_text(value, unit, limit) == shown


# (value, metric unit, limit text) -> shown headroom; the stored headroom is computed by the
# judge in the metric's unit, exactly as verification stores it.
HEADROOM = [
    (0.145134, "s", "<= 200 ms", "+54.87 ms (+27 % of the limit)"),   # 200 - 145.134
    (2 * math.pi * 7.915, "rad/s", ">= 5 Hz", "+2.915 Hz (+58 % of the limit)"),
    (1.615, "ratio", "<= 6 dB", "+1.837 dB"),             # 6 - 4.16346 dB, no percentage
    (2.5, "ratio", "<= 6 dB", "-1.959 dB"),               # 6 - 20 log10 2.5 = 6 - 7.95880
    (8.1, "dB", ">= 6 dB", "+2.1 dB"),                    # a dB quantity: difference in dB
    (5.9, "dB", ">= 6 dB", "-0.1 dB"),
    (12.5, "%", "<= 25 %", "+12.5 %pt"),                  # percentage points, no fraction
    (1.6974, "A", "<= 2500 mA", "+802.6 mA (+32 % of the limit)"),
    (50.0, "deg", ">= 45 deg", "+5 deg (+11 % of the limit)"),
]


@pytest.mark.parametrize("value, unit, limit, shown", HEADROOM)
def test_headroom_in_the_limits_unit(value, unit, limit, shown):
    from ledger.units import parse_limit_for

    plants = [("x", "A", "rad")] if unit == "A" else []
    lim = parse_limit_for(limit, "peak_effort" if unit == "A" else "m", unit, plants) \
        if unit == "A" else parse_limit(limit, unit)
    j = judge(lim, value)
    assert headroom_text(value, j.headroom, j.headroom_fraction, unit, limit) == shown


def test_headroom_of_log_quantities_is_never_a_percentage():
    for value, unit, limit in [(1.615, "ratio", "<= 6 dB"), (8.1, "dB", ">= 6 dB"),
                               (3.0, "dB", ">= 2 ratio")]:
        j = judge(parse_limit(limit, unit), value)
        assert "%" not in headroom_text(value, j.headroom, j.headroom_fraction, unit, limit)


def test_deltas_in_the_limits_unit():
    assert delta_text(0.1, 0.125, "s", "<= 200 ms") == "+25 ms"
    assert delta_text(16.3, 44.43, "%", "<= 25 %") == "+28.13 %pt"
    # headroom change of a ratio limited in dB: (6 - 20 log10 1.5) - (6 - 20 log10 1.2)
    # = -20 log10 1.25 = -1.938 dB
    assert headroom_delta_text(1.2, 1.5, 10 ** 0.3 - 1.2, 10 ** 0.3 - 1.5, "ratio",
                               "<= 6 dB") == "-1.938 dB"


def test_digits_setting(monkeypatch):
    assert value_text(0.145134, "s", "<= 200 ms") == "145.1 ms"
    monkeypatch.setenv("LOOPLEDGER_DIGITS", "6")
    assert value_text(0.145134, "s", "<= 200 ms") == "145.134 ms"
    display.set_digits(3)
    try:
        assert value_text(0.145134, "s", "<= 200 ms") == "145 ms"
    finally:
        display.set_digits(None)
