"""Controller blocks: coefficients against hand-built python-control products and closed-form
frequency-response values."""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
from numpy.testing import assert_allclose

from ledger.errors import ModelError, ModelSyntaxError
from ledger.systems import BLOCKS, compile_model, is_proper, parse_model

s = control.tf("s")


def monic(sys):
    num = np.trim_zeros(np.asarray(sys.num[0][0], dtype=float), "f")
    den = np.trim_zeros(np.asarray(sys.den[0][0], dtype=float), "f")
    if num.size == 0:
        num = np.zeros(1)
    return num / den[0], den / den[0]


def assert_same_tf(got, ref, rtol=1e-12):
    gn, gd = monic(got)
    rn, rd = monic(ref)
    assert gn.shape == rn.shape and gd.shape == rd.shape, (gn, gd, rn, rd)
    assert_allclose(gn, rn, rtol=rtol, atol=rtol * np.max(np.abs(rn)))
    assert_allclose(gd, rd, rtol=rtol, atol=rtol * np.max(np.abs(rd)))


def resp(sys, w):
    """Frequency response at w rad/s, evaluated by python-control."""
    return complex(sys(1j * w))


W60 = 2 * math.pi * 60

# Source for every row: the block's documented formula built with python-control transfer-
# function arithmetic (reference library), independently of our coefficient layout.
BLOCK_CASES = [
    ("pid(2, 5, 0.01, 0.001)", 2 + 5 / s + 0.01 * s / (0.001 * s + 1)),
    ("pid(kp=2, ki=5, kd=0.01, tf=0.001)", 2 + 5 / s + 0.01 * s / (0.001 * s + 1)),
    ("pid(tf=0.001, kd=0.01, kp=2, ki=5)", 2 + 5 / s + 0.01 * s / (0.001 * s + 1)),
    ("pid(3, 40)", 3 + 40 / s),
    ("pid(2, kd=0.1, tf=0.01)", 2 + 0.1 * s / (0.01 * s + 1)),
    ("pi(0.8, 12)", 0.8 + 12 / s),
    ("pd(4, 0.02, 0.002)", 4 + 0.02 * s / (0.002 * s + 1)),
    ("pd(4, 0.02)", 4 + 0.02 * s),
    ("lead(1.5, 100, 900)", 1.5 * (s / 100 + 1) / (s / 900 + 1)),
    ("lag(10, 5, 0.5)", 10 * (s / 5 + 1) / (s / 0.5 + 1)),
    ("notch(2*pi*60, 0.05, 0.7)",
     (s ** 2 + 2 * 0.05 * W60 * s + W60 ** 2) / (s ** 2 + 2 * 0.7 * W60 * s + W60 ** 2)),
    ("lowpass(1000)", 1 / (s / 1000 + 1)),
    ("lowpass2(2000, 0.6)", 2000 ** 2 / (s ** 2 + 2 * 0.6 * 2000 * s + 2000 ** 2)),
    ("integrator(7)", 7 / s),
    ("gain(-2.5)", control.tf([-2.5], [1])),
    ("pid(kp=2, ki=5, kd=0.01, tf=0.001)*notch(2*pi*60, 0.05, 0.7)*lowpass(1000)",
     (2 + 5 / s + 0.01 * s / (0.001 * s + 1))
     * (s ** 2 + 2 * 0.05 * W60 * s + W60 ** 2) / (s ** 2 + 2 * 0.7 * W60 * s + W60 ** 2)
     * (1 / (s / 1000 + 1))),
    ("lead(2, 30, 300)*8/(s*(s+12))", 2 * (s / 30 + 1) / (s / 300 + 1) * 8 / (s * (s + 12))),
]


@pytest.mark.parametrize("text,ref", BLOCK_CASES, ids=[c[0] for c in BLOCK_CASES])
def test_block_matches_hand_built_product(text, ref):
    # rtol 1e-11: the two sides multiply the same numbers in different orders
    assert_same_tf(parse_model(text).system, ref, rtol=1e-11)


def test_notch_depth_at_centre_frequency():
    # Source: closed form; at s = j*w0 the notch is (2j*zeta_z*w0^2)/(2j*zeta_p*w0^2), so its
    # magnitude is zeta_z/zeta_p and its phase 0.
    sys = parse_model("notch(2*pi*60, 0.05, 0.7)").system
    h = resp(sys, W60)
    assert_allclose(abs(h), 0.05 / 0.7, rtol=1e-10)
    assert_allclose(np.angle(h), 0.0, atol=1e-10)


def test_lead_maximum_phase():
    # Source: textbook lead-compensator result (e.g. Ogata, Modern Control Engineering, lead
    # compensation; from memory): max phase at w = sqrt(wz*wp), sin(phi_max) = (wp-wz)/(wp+wz).
    wz, wp = 100.0, 900.0
    sys = parse_model(f"lead(1.5, {wz}, {wp})").system
    wm = math.sqrt(wz * wp)
    assert_allclose(np.angle(resp(sys, wm)), math.asin((wp - wz) / (wp + wz)), rtol=1e-12)
    # a nearby frequency has less phase (it is the maximum)
    assert np.angle(resp(sys, wm * 1.05)) < np.angle(resp(sys, wm))
    # gain: k at DC, k*wp/wz at high frequency (closed form)
    assert_allclose(abs(resp(sys, 1e-6)), 1.5, rtol=1e-9)
    assert_allclose(abs(resp(sys, 1e9)), 1.5 * wp / wz, rtol=1e-6)


def test_lowpass_corner_values():
    # Source: closed form; 1/(j+1) has magnitude 1/sqrt(2) and phase -45 deg at w = wc;
    # wn^2/(s^2+2 zeta wn s+wn^2) at s = j*wn is 1/(2j*zeta): magnitude 1/(2 zeta), phase -90.
    h1 = resp(parse_model("lowpass(1000)").system, 1000.0)
    assert_allclose(abs(h1), 1 / math.sqrt(2), rtol=1e-12)
    assert_allclose(np.degrees(np.angle(h1)), -45.0, rtol=1e-12)
    h2 = resp(parse_model("lowpass2(2000, 0.6)").system, 2000.0)
    assert_allclose(abs(h2), 1 / (2 * 0.6), rtol=1e-12)
    assert_allclose(np.degrees(np.angle(h2)), -90.0, rtol=1e-12)


def test_pid_frequency_response_matches_definition():
    # Source: the block's definition kp + ki/(jw) + kd*jw/(tf*jw + 1), evaluated directly.
    kp, ki, kd, tf = 2.0, 5.0, 0.01, 0.001
    sys = parse_model(f"pid({kp}, {ki}, {kd}, {tf})").system
    for w in (0.1, 3.0, 100.0, 5000.0):
        jw = 1j * w
        assert_allclose(resp(sys, w), kp + ki / jw + kd * jw / (tf * jw + 1), rtol=1e-12)


def test_zero_integral_gain_leaves_no_pole_at_origin():
    # Source: closed form, kp + kd s/(tf s+1) = ((kp tf + kd) s + kp)/(tf s + 1).
    for text in ("pid(2, 0, 0.1, 0.01)", "pid(2, kd=0.1, tf=0.01)"):
        n, d = monic(parse_model(text).system)
        assert_allclose(n, [(2 * 0.01 + 0.1) / 0.01, 2 / 0.01], rtol=1e-13)
        assert_allclose(d, [1.0, 1 / 0.01], rtol=1e-13)
    n, d = monic(parse_model("pi(3, 0)").system)
    assert_allclose(n, [3.0], rtol=0)
    assert_allclose(d, [1.0], rtol=0)


def test_zero_integral_gain_in_a_batch():
    # Two-method check: batch rows against single evaluations, with ki = 0 in one variant.
    m = compile_model("pid(kp, ki, 0.02, 0.002)/(s+1)")
    num, den, _ = m.evaluate_batch({"kp": np.array([1.0, 2.0, 3.0]),
                                    "ki": np.array([0.0, 4.0, 0.0])})
    for i, (kp, ki) in enumerate([(1.0, 0.0), (2.0, 4.0), (3.0, 0.0)]):
        ref = (kp + ki / s + 0.02 * s / (0.002 * s + 1)) / (s + 1)  # python-control arithmetic
        rn, rd = monic(ref)
        k = num.shape[1]
        assert_allclose(num[i], np.pad(rn, (k - rn.size, 0)), rtol=1e-12, atol=1e-12)
        assert_allclose(den[i], np.pad(rd, (k - rd.size, 0)), rtol=1e-12, atol=1e-12)


def test_ideal_derivative_is_parsed_but_improper():
    sys = parse_model("pid(1, 1, 0.1, 0)").system
    # Source: closed form, 1 + 1/s + 0.1 s = (0.1 s^2 + s + 1)/s
    n, d = monic(sys)
    assert_allclose(n, [0.1, 1.0, 1.0], rtol=1e-15)
    assert_allclose(d, [1.0, 0.0], rtol=0, atol=0)
    assert not is_proper(sys)


def test_block_arguments_accept_parameters_and_pi():
    # Source: python-control arithmetic with the same numbers (reference library)
    ev = parse_model("notch(2*pi*f, zz, zp)*lowpass(wc)",
                     {"f": 58.0, "zz": 0.02, "zp": 0.5, "wc": 3000.0})
    w0 = 2 * math.pi * 58.0
    ref = ((s ** 2 + 2 * 0.02 * w0 * s + w0 ** 2) / (s ** 2 + 2 * 0.5 * w0 * s + w0 ** 2)
           / (s / 3000.0 + 1))
    assert_same_tf(ev.system, ref, rtol=1e-11)
    assert compile_model("notch(2*pi*f, zz, zp)").parameters == {"f", "zz", "zp"}


@pytest.mark.parametrize("text,words", [
    ("lead(1, -5, 100)", "wz=-5"),
    ("lag(1, 5, 0)", "wp=0"),
    ("notch(0, 0.1, 0.5)", "w0=0"),
    ("notch(10, -0.1, 0.5)", "zeta_z=-0.1"),
    ("lowpass(-3)", "wc=-3"),
    ("lowpass2(100, -0.2)", "zeta=-0.2"),
    ("pid(1, 1, 0.1, -0.01)", "tf=-0.01"),
    ("pd(1, 0.1, -1)", "tf=-1"),
    ("gain(1/0)", "division by zero"),
])
def test_block_argument_ranges(text, words):
    with pytest.raises(ModelError, match=words):
        parse_model(text)


@pytest.mark.parametrize("name", sorted(BLOCKS))
def test_every_block_refused_in_a_z_model(name):
    spec = BLOCKS[name]
    text = "(z-0.5)/(z-1)*" + name + "(" + ", ".join("1" for _ in spec.args) + ")"
    with pytest.raises(ModelSyntaxError, match="continuous-time") as info:
        compile_model(text)
    assert info.value.position == len("(z-0.5)/(z-1)*")


def test_block_names_are_reserved():
    with pytest.raises(ModelSyntaxError, match="call it as lead") as info:
        compile_model("1/(lead*s+1)")
    assert info.value.position == 3


def test_docs_list_every_block_formula():
    # Every block and its formula appear in docs/models.md (docs kept true by a test).
    from pathlib import Path

    doc = (Path(__file__).resolve().parents[1] / "docs" / "models.md").read_text()
    for name, spec in BLOCKS.items():
        assert f"`{name}(" in doc, name
        assert spec.formula in doc, spec.formula
