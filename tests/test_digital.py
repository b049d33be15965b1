"""Digital controllers (issue 14): discretisation methods, firmware forms, coefficient
quantisation and fractional computation delay, each against an outside reference.

References:
* scipy.signal.cont2discrete (``zoh``, ``bilinear`` with and without ``alpha``), python-control
  ``sample_system`` (``tustin`` with ``prewarp_frequency``, ``matched``);
* closed forms of the three maps for a first-order lead (Franklin, Powell and Workman,
  *Digital Control of Dynamic Systems*, 3rd ed., ch. 6, from memory; derived again in each
  test's comment);
* scipy.signal.lfilter / sosfilt / sos2tf / dlsim for the firmware forms;
* numpy.roots for pole locations, python-control ``feedback`` for closed loops;
* the modified z-transform of a first-order lag with a fractional delay (Franklin, Powell
  and Workman, section 4.3.4, from memory; derived in the test's comment).
"""

from __future__ import annotations

import itertools
import math

import control
import numpy as np
import pytest
import scipy.signal

from ledger.engine import measure
from ledger.engine.c2d import continuous_equivalent, discretize, parse_discretization
from ledger.engine.loop import LoopSpec, assemble
from ledger.engine.quantize import (parse_number_format, pole_shift, quantize_system,
                                    quantize_values)
from ledger.errors import ModelError
from ledger.systems import build_family, parse_model

T = 1e-3
W = 2 * math.pi

CONTROLLERS = {
    "lead": "lead(12, 2*pi*2, 2*pi*30)",
    "notch_lowpass": "notch(2*pi*60, 0.05, 0.7)*lowpass(2*pi*200)",
    "pid_filtered": "pid(kp=0.9, ki=30, kd=0.004, tf=0.0004)",
    "lag2": "lowpass2(2*pi*80, 0.4)*lag(1, 2*pi*5, 2*pi*1)",
}


def _tf(text):
    return parse_model(text).system


def _coeffs(sys):
    num = np.trim_zeros(np.asarray(sys.num[0][0], float), "f")
    den = np.trim_zeros(np.asarray(sys.den[0][0], float), "f")
    return num / den[0], den / den[0]


def _pad(a, n):
    return np.concatenate([np.zeros(n - a.size), a])


def _same_tf(ours, num_ref, den_ref, rtol=1e-9):
    n, d = _coeffs(ours)
    num_ref = np.trim_zeros(np.asarray(num_ref, float).reshape(-1), "f")
    den_ref = np.asarray(den_ref, float).reshape(-1)
    num_ref, den_ref = num_ref / den_ref[0], den_ref / den_ref[0]
    k = max(n.size, num_ref.size)
    scale = max(1.0, np.max(np.abs(num_ref)))
    np.testing.assert_allclose(_pad(n, k), _pad(num_ref, k), rtol=rtol, atol=rtol * scale)
    np.testing.assert_allclose(d, den_ref, rtol=rtol, atol=rtol)


# ----------------------------------------------------------------------- discretisation

@pytest.mark.parametrize("name", sorted(CONTROLLERS))
def test_zoh_and_tustin_match_scipy_cont2discrete(name):
    # Source: scipy.signal.cont2discrete, methods 'zoh' and 'bilinear'
    K = _tf(CONTROLLERS[name])
    num, den = _coeffs(K)
    for ours, ref in (("zoh", "zoh"), ("tustin", "bilinear")):
        nd, dd, _ = scipy.signal.cont2discrete((num, den), T, method=ref)
        _same_tf(discretize(K, T, ours), nd, dd, rtol=1e-8)


@pytest.mark.parametrize("name", sorted(CONTROLLERS))
def test_prewarped_tustin_matches_python_control(name):
    # Source: python-control sample_system(method='tustin', prewarp_frequency=w)
    K = _tf(CONTROLLERS[name])
    w = W * 45.0
    ref = control.sample_system(K, T, method="tustin", prewarp_frequency=w)
    _same_tf(discretize(K, T, f"tustin@{w!r}"), ref.num[0][0], ref.den[0][0], rtol=1e-8)
    # the same frequency in hertz
    _same_tf(discretize(K, T, "tustin@45Hz"), ref.num[0][0], ref.den[0][0], rtol=1e-8)
    # the defining property: the discrete response equals the continuous one at w
    zc = complex(K(1j * w))
    zd = complex(discretize(K, T, "tustin@45Hz")(np.exp(1j * w * T)))
    assert abs(zd - zc) <= 1e-9 * abs(zc)


@pytest.mark.parametrize("name", ["lead", "notch_lowpass"])
def test_matched_matches_python_control_when_no_zero_at_infinity_is_added(name):
    # Source: python-control sample_system(method='matched'): poles and zeros mapped by
    # exp(s T), DC gain matched, no zeros added at infinity.  Ours adds (relative degree)
    # zeros at z = -1 (Franklin, Powell and Workman); for the lead (relative degree 0) the
    # two agree; for notch*lowpass ours is python-control's times (z + 1)/2 (same DC gain).
    K = _tf(CONTROLLERS[name])
    ref = control.sample_system(K, T, method="matched")
    rn, rd = _coeffs(ref)
    rel = np.trim_zeros(K.den[0][0], "f").size - np.trim_zeros(K.num[0][0], "f").size
    rn = np.polymul(rn, np.polynomial.polynomial.polyfromroots([-1.0] * rel)[::-1]) / 2 ** rel
    _same_tf(discretize(K, T, "matched"), rn, rd, rtol=1e-8)


def test_first_order_lead_closed_forms():
    # K (s/wz + 1)/(s/wp + 1) = K wp/wz (s + wz)/(s + wp); g = K wp / wz.  Derived by hand:
    #   Tustin, s = c (z-1)/(z+1):  g ((c+wz) z - (c-wz)) / ((c+wp) z - (c-wp))
    #   ZOH: (s+wz)/(s+wp) = 1 + (wz-wp)/(s+wp) and ZOH{1/(s+wp)} = (1-p)/(wp (z-p)),
    #        p = exp(-wp T):  g (z - p + (wz-wp)(1-p)/wp) / (z - p)
    #   matched: g' (z - exp(-wz T)) / (z - p) with g' (1 - exp(-wz T)) / (1 - p) = K
    k, wz, wp = 12.0, W * 2, W * 30
    K = _tf(f"lead({k}, {wz!r}, {wp!r})")
    g = k * wp / wz
    for c in (2 / T, W * 40 / math.tan(W * 40 * T / 2)):
        method = "tustin" if c == 2 / T else "tustin@40Hz"
        _same_tf(discretize(K, T, method), [g * (c + wz), -g * (c - wz)],
                 [c + wp, -(c - wp)], rtol=1e-12)
    p = math.exp(-wp * T)
    _same_tf(discretize(K, T, "zoh"), [g, g * (-p + (wz - wp) * (1 - p) / wp)], [1, -p],
             rtol=1e-10)
    q = math.exp(-wz * T)
    g2 = k * (1 - p) / (1 - q)
    _same_tf(discretize(K, T, "matched"), [g2, -g2 * q], [1, -p], rtol=1e-12)


@pytest.mark.parametrize("method", ["zoh", "tustin", "tustin@30Hz", "matched"])
@pytest.mark.parametrize("name", ["lead", "notch_lowpass", "lag2"])
def test_continuous_equivalent_inverts_each_method(method, name):
    # Source: the definition of each map (the inverse of a map applied to its image)
    K = _tf(CONTROLLERS[name])
    back = continuous_equivalent(discretize(K, T, method), method)
    assert back is not None
    w = np.array([0.5, 5.0, 50.0, 500.0])
    kc = np.array([complex(K(1j * x)) for x in w])
    kb = np.array([complex(back(1j * x)) for x in w])
    np.testing.assert_allclose(kb, kc, rtol=1e-6)


def test_no_zoh_equivalent_for_a_pole_on_the_negative_real_axis():
    # A discrete pole at z = -0.5 is exp(A T) of no real A (a real logarithm does not exist)
    assert continuous_equivalent(control.tf([1.0], [1.0, 0.5], T), "zoh") is None


def test_method_text_is_checked():
    assert parse_discretization("Tustin@30Hz").prewarp == pytest.approx(W * 30, rel=1e-15)
    # a product of numbers and pi, as the model text writes frequencies (exact: the same
    # floating-point product)
    assert parse_discretization("tustin@2*pi*30").prewarp == 2 * math.pi * 30
    assert parse_discretization("tustin@ 2 * pi * 5 Hz").prewarp == 2 * math.pi * 10 * math.pi
    for bad in ("bilinear", "zoh@30", "tustin@0", "tustin@-3", "tustin@abc", "tustin@2**3",
                "tustin@pi*", "tustin@2*pi*0"):
        with pytest.raises(ModelError):
            parse_discretization(bad)
    # a pre-warp at or above the Nyquist frequency pi / T has no map
    with pytest.raises(ModelError, match="Nyquist"):
        discretize(_tf("lowpass(10)"), T, f"tustin@{math.pi / T}")


def test_measure_discretization_and_the_old_name_agree_and_default_still_refuses():
    plant, ctl = "40/(s*(0.05*s+1))", "lead(0.3, 2*pi*2, 2*pi*30)"
    a = measure(plant, ctl, ["phase_margin"], sample_time=T, discretization="tustin")
    b = measure(plant, ctl, ["phase_margin"], sample_time=T, controller_discretization="tustin")
    assert a["phase_margin"] == b["phase_margin"]
    # Source: python-control margin() on the loop built from sample_system (tustin)
    G = control.sample_system(_tf(plant), T, method="zoh")
    Kd = control.sample_system(_tf(ctl), T, method="tustin")
    _, pm, _, _ = control.margin(Kd * G)
    assert a["phase_margin"] == pytest.approx(pm, rel=1e-6)
    with pytest.raises(ModelError, match="discretisation method"):
        measure(plant, ctl, ["phase_margin"], sample_time=T)


# ----------------------------------------------------------------------- firmware forms

def _impulse(sys, n):
    """Response to the unit pulse u = [1, 0, 0, ...] by python-control forced_response."""
    u = np.zeros(n)
    u[0] = 1.0
    res = control.forced_response(sys, T=np.arange(n) * T, U=u)
    return np.asarray(res.outputs).reshape(-1)


def test_diffeq_matches_lfilter():
    # Source: scipy.signal.lfilter(b, [1, a1, ...]): y[k] = sum b_i u[k-i] - sum a_j y[k-j]
    b, a = [0.5, -0.2, 0.1], [-1.2, 0.5, -0.05]
    sys = parse_model(f"diffeq({b}, {a})", sample_time=T).system
    x = np.zeros(40)
    x[0] = 1.0
    ref = scipy.signal.lfilter(b, [1.0] + a, x)
    np.testing.assert_allclose(_impulse(sys, 40), ref, rtol=1e-10, atol=1e-12)
    # unequal lengths: an FIR and a pure-recursive one
    sys = parse_model("diffeq([1, 2, 3], [])", sample_time=T).system
    np.testing.assert_allclose(_impulse(sys, 6), scipy.signal.lfilter([1, 2, 3], [1], x[:6]))
    sys = parse_model("diffeq([0.25], [-0.5, 0.06])", sample_time=T).system
    np.testing.assert_allclose(_impulse(sys, 20),
                               scipy.signal.lfilter([0.25], [1, -0.5, 0.06], x[:20]),
                               rtol=1e-10, atol=1e-14)


def test_sos_matches_sosfilt_and_sos2tf():
    # Source: scipy.signal.sosfilt and sos2tf (rows b0 b1 b2 a0 a1 a2 with a0 = 1)
    rows = [[1.0, -1.8, 0.9, -1.6, 0.72], [0.3, 0.6, 0.3, -0.4, 0.2]]
    g = 0.75
    sys = parse_model(f"sos({rows}, {g})", sample_time=T).system
    sos = np.array([[r[0], r[1], r[2], 1.0, r[3], r[4]] for r in rows])
    x = np.zeros(60)
    x[0] = 1.0
    np.testing.assert_allclose(_impulse(sys, 60), g * scipy.signal.sosfilt(sos, x),
                               rtol=1e-9, atol=1e-12)
    bn, an = scipy.signal.sos2tf(sos)
    _same_tf(sys, g * bn, an, rtol=1e-12)


def test_zss_matches_dlsim():
    # Source: scipy.signal.dlsim of the same (A, B, C, D) with dt = T
    A = [[0.9, 0.1], [-0.2, 0.7]]
    B, C, D = [[1.0], [0.5]], [[0.3, -0.4]], [[0.1]]
    sys = parse_model(f"zss({A}, {B}, {C}, {D})", sample_time=T).system
    assert sys.dt == T
    x = np.zeros(30)
    x[0] = 1.0
    _, y, _ = scipy.signal.dlsim((np.array(A), np.array(B), np.array(C), np.array(D), T), x)
    np.testing.assert_allclose(_impulse(sys, 30), y.reshape(-1), rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("text,where", [
    ("sos([[1, 2, 1, -1.5]])", "5 entries"),
    ("diffeq([], [0.5])", "at least b0"),
    ("s*diffeq([1], [0.5])", "both s and z"),
    ("zss([[1]], [[1]], [[1]], [[0]])*2", "whole model"),
    ("lead(1, 2, 3)*sos([[1, 0, 0, 0, 0]])", "continuous-time block"),
])
def test_firmware_form_errors(text, where):
    from ledger.errors import ModelSyntaxError
    from ledger.systems import compile_model

    with pytest.raises(ModelSyntaxError, match=where):
        compile_model(text)


# ----------------------------------------------------------------------- quantisation

def test_fixed_point_rounding_and_range():
    # round(c 2^F) / 2^F, ties to even; range [-2^(W-F-1), 2^(W-F-1) - 2^-F] (two's
    # complement; common practice, no source)
    f = parse_number_format("fixed:8/6")
    np.testing.assert_array_equal(quantize_values([0.3, -1.99, 1.984375, 0.5 / 64], f),
                                  [19 / 64, -127 / 64, 127 / 64, 0.0])
    with pytest.raises(ModelError, match="does not fit fixed:8/6"):
        quantize_values([2.0], f)
    # IEEE single: 0.1 is stored as 0.100000001490116119384765625 (IEEE 754 binary32)
    assert quantize_values([0.1], parse_number_format("single"))[0] == \
        0.100000001490116119384765625
    for bad in ("fixed:8", "fixed:8/8", "q15", "double"):
        with pytest.raises(ModelError):
            parse_number_format(bad)


NOTCH = "notch(2*pi*20, 0.02, 0.3)*lowpass2(2*pi*15, 0.7)"


def test_notch_poles_leave_the_unit_circle_at_8_fractional_bits_but_not_16():
    # A 20 Hz notch behind a 15 Hz second-order low-pass at 1 kHz (Tustin), held in direct
    # form (a1..a4): its poles, radius 0.963, crowd z = 1, where direct-form coefficients
    # are notoriously sensitive.  Roots by numpy.roots on the quantised denominator.
    Kd = discretize(_tf(NOTCH), T, "tustin")
    a = _coeffs(Kd)[1]
    assert np.max(np.abs(np.roots(a))) == pytest.approx(0.9631284, abs=1e-6)

    def radius(F):
        q = np.concatenate([[1.0], quantize_values(a[1:], parse_number_format(f"fixed:{F + 4}/{F}"))])
        return np.max(np.abs(np.roots(q)))

    assert radius(8) > 1.1
    assert radius(16) < 0.97


def _closed_poles(K, G):
    return np.asarray(control.poles(control.feedback(K * G, 1)))


def _best_matching_max(p, q):
    best = min(itertools.permutations(range(len(q))),
               key=lambda perm: sum(abs(p[i] - q[j]) for i, j in enumerate(perm)))
    return max(abs(p[i] - q[j]) for i, j in enumerate(best))


@pytest.mark.parametrize("fmt,stable", [("fixed:20/16", 1.0), ("fixed:12/8", 0.0),
                                        ("single", 1.0)])
def test_quantised_loop_stability_and_pole_shift(fmt, stable):
    # The notch of the test above as a difference equation scaled to b0 = 1, in a loop with
    # a small plant gain (stable with exact coefficients).  Reference: python-control feedback() of the quantised and the exact
    # controller times the plant sampled by sample_system(zoh); pole movement by brute-force
    # matching (every permutation, least total distance).
    b, a = _coeffs(discretize(_tf(NOTCH), T, "tustin"))
    text = f"diffeq({(b / b[0]).tolist()}, {a[1:].tolist()})"
    plant = "0.04/(s*(0.05*s+1))"
    m = measure(plant, text, ["stable", "quantization_pole_shift"], sample_time=T,
                number_format=fmt)
    K = parse_model(text, sample_time=T).system
    Kq = quantize_system(K, fmt)
    G = control.sample_system(_tf(plant), T, method="zoh")
    pq, p0 = _closed_poles(Kq, G), _closed_poles(K, G)
    assert float(np.max(np.abs(pq)) < 1) == stable == m["stable"]
    ref = _best_matching_max(p0, pq)
    assert m["quantization_pole_shift"] == pytest.approx(ref, rel=1e-6, abs=1e-9)
    assert pole_shift(p0, pq) == pytest.approx(ref, rel=1e-12)


def test_pole_shift_is_zero_without_a_number_format():
    m = measure("4/(s*(0.05*s+1))", "diffeq([0.5, -0.4], [-0.9])", ["quantization_pole_shift"],
                sample_time=T)
    assert m["quantization_pole_shift"] == 0.0


def test_every_b_rounding_to_zero_is_refused():
    with pytest.raises(ModelError, match="rounds to 0"):
        quantize_system(control.tf([1e-4], [1, -0.5], T), "fixed:12/8")


# ----------------------------------------------------------------------- fractional delay

@pytest.mark.parametrize("whole", [0, 1])
def test_fractional_computation_delay_matches_the_modified_z_transform(whole):
    # G(s) = a / (s + a), ZOH, input delayed by f = 0.3 T (plus `whole` samples).  The
    # modified z-transform (derived by hand: over the sample the held input u[k-1] acts for f,
    # u[k] for T - f), with p = exp(-a T), q = exp(-a (T - f)):
    #   G(z) = ((1 - q) z + (q - p)) / (z (z - p)) * z^-whole
    # With a gain k in the loop the closed-loop poles are the roots of
    #   z^(1+whole) (z - p) + k ((1 - q) z + (q - p)).
    a, k, f = 50.0, 3.0, 0.3
    p, q = math.exp(-a * T * 20), math.exp(-a * (T * 20) * (1 - f))
    ts = 20 * T
    fam = build_family(f"{a}/(s+{a})", {})
    asm = assemble(fam, k, LoopSpec(sample_time=ts, computation_delay=whole + f))
    ours = np.sort_complex(asm.groups[0].poles[0])
    char = np.polyadd(np.polymul(np.concatenate([[1.0], np.zeros(1 + whole)]), [1.0, -p]),
                      k * np.array([1 - q, q - p]))
    ref = np.sort_complex(np.roots(char))
    ours = ours[np.abs(ours) > 1e-12]     # the delay line's states at z = 0 (none here)
    ref = ref[np.abs(ref) > 1e-12]
    np.testing.assert_allclose(ours, ref, rtol=1e-9, atol=1e-12)


def test_fractional_computation_delay_equals_an_input_delay_of_the_same_time():
    # the same physics written two ways (a processor latency is an actuation delay)
    plant, ctl = "40/(s*(0.05*s+1))", "diffeq([0.3, -0.29], [-0.95])"
    a = measure(plant, ctl, ["phase_margin"], sample_time=T, computation_delay=1.3)
    b = measure(plant, ctl, ["phase_margin"], sample_time=T, computation_delay=1,
                input_delay=0.3 * T)
    assert a["phase_margin"] == pytest.approx(b["phase_margin"], rel=1e-9)
