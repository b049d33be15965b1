"""Model-text parser: valid forms against python-control, positioned errors, batch evaluation,
digests, and a property test that nothing but the product's own errors escapes."""

from __future__ import annotations

import math
import re

import control
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from ledger.errors import ModelError, ModelSyntaxError
from ledger.systems import compile_model, is_proper, parse_model, system_digest


def monic(sys):
    """Numerator and denominator with leading zeros removed and a monic denominator."""
    num = np.trim_zeros(np.asarray(sys.num[0][0], dtype=float), "f")
    den = np.trim_zeros(np.asarray(sys.den[0][0], dtype=float), "f")
    if num.size == 0:
        num = np.zeros(1)
    return num / den[0], den / den[0]


def assert_same_tf(got, ref, rtol=1e-12):
    gn, gd = monic(got)
    rn, rd = monic(ref)
    assert gn.shape == rn.shape and gd.shape == rd.shape, (gn, gd, rn, rd)
    scale_n = max(np.max(np.abs(rn)), 1e-300)
    scale_d = np.max(np.abs(rd))
    assert_allclose(gn, rn, rtol=rtol, atol=rtol * scale_n)
    assert_allclose(gd, rd, rtol=rtol, atol=rtol * scale_d)


PARAMS = {"Kt": 0.12, "J": 3.2e-5, "b": 4.0e-4}

# Source for every row: reference library python-control 0.10.2 (control.tf / control.zpk and
# its transfer-function arithmetic), building the same system independently of our parser.
VALID = [
    ("8/(s*(s+12))", None, lambda: control.tf([8], [1, 12, 0])),
    ("8 / ( s * ( s + 12 ) )", None, lambda: control.tf([8], [1, 12, 0])),
    ("(s+2)^2/(s^3+4*s^2+3*s)", None, lambda: control.tf([1, 4, 4], [1, 4, 3, 0])),
    ("(s+2)**2/(s**3+4*s**2+3*s)", None, lambda: control.tf([1, 4, 4], [1, 4, 3, 0])),
    ("2.5e3*(s/40+1)/(s*(s/900+1))", None,
     lambda: 2.5e3 * control.tf([1 / 40, 1], [1]) / control.tf([1 / 900, 1, 0], [1])),
    ("-s/(s+1)", None, lambda: control.tf([-1, 0], [1, 1])),
    ("+.5*s/(1e-3*s+1)", None, lambda: control.tf([0.5, 0], [1e-3, 1])),
    ("1/(s+1) + 2/(s+3) - 1/s", None,
     lambda: control.tf([1], [1, 1]) + control.tf([2], [1, 3]) - control.tf([1], [1, 0])),
    ("2*pi*60/(s+2*pi*60)", None,
     lambda: control.tf([2 * math.pi * 60], [1, 2 * math.pi * 60])),
    ("(s^2+0.4*s+4)^2/((s+1)^3*(s+10))", None,
     lambda: control.tf([1, 0.4, 4], [1]) ** 2 / (control.tf([1, 1], [1]) ** 3
                                                  * control.tf([1, 10], [1]))),
    ("s^0*3", None, lambda: control.tf([3], [1])),
    ("Kt/(s*(J*s+b))", PARAMS, lambda: control.tf([0.12], [3.2e-5, 4.0e-4, 0])),
    ("zpk([-2, -3], [0, -1, -5+2j, -5-2j], 10)", None,
     lambda: control.zpk([-2, -3], [0, -1, -5 + 2j, -5 - 2j], 10)),
    ("zpk([], [-1, -2], 2)", None, lambda: control.zpk([], [-1, -2], 2)),
    ("zpk([-b/J], [0, -2*pi*60*(1+1j), -2*pi*60*(1-1j)], Kt)", PARAMS,
     lambda: control.zpk([-4.0e-4 / 3.2e-5],
                         [0, -2 * math.pi * 60 * (1 + 1j), -2 * math.pi * 60 * (1 - 1j)], 0.12)),
]


@pytest.mark.parametrize("text,params,ref", VALID, ids=[v[0] for v in VALID])
def test_valid_forms_match_python_control(text, params, ref):
    ev = parse_model(text, params)
    assert ev.delay == 0.0
    assert ev.system.dt == 0
    # rtol 1e-12: both sides do a handful of floating-point products of the same numbers
    assert_same_tf(ev.system, ref(), rtol=1e-12)


def test_state_space_matches_control_ss():
    # Source: python-control control.ss with the same matrices (reference library)
    text = "ss([[0, 1], [-2, -3]], [[0], [1]], [[1, 0]], [[0]])"
    ev = parse_model(text)
    ref = control.ss([[0, 1], [-2, -3]], [[0], [1]], [[1, 0]], [[0]])
    assert isinstance(ev.system, control.StateSpace)
    for got, want in ((ev.system.A, ref.A), (ev.system.B, ref.B), (ev.system.C, ref.C),
                      (ev.system.D, ref.D)):
        assert_allclose(got, want, rtol=0, atol=0)  # exact: same literal numbers


def test_state_space_with_parameters():
    # Source: python-control control.ss (reference library)
    ev = parse_model("ss([[-b/J]], [[1/J]], [[Kt]], [[0]])", PARAMS)
    ref = control.ss([[-4.0e-4 / 3.2e-5]], [[1 / 3.2e-5]], [[0.12]], [[0]])
    assert_allclose(ev.system.A, ref.A, rtol=1e-15)
    assert_allclose(ev.system.B, ref.B, rtol=1e-15)
    assert_allclose(ev.system.C, ref.C, rtol=1e-15)


@pytest.mark.parametrize("text", ["1/(s+1)", "pid(1, 2)", "zpk([], [-1], 1)", "3",
                                  "ss([[-1]], [[1]], [[1]], [[0]])"])
def test_continuous_models_stay_continuous_when_a_loop_sample_time_is_passed(text):
    # A digital loop passes its sample time for every text; only z models use it.
    assert parse_model(text, sample_time=0.01).system.dt == 0
    assert parse_model(text).system.dt == 0


def test_discrete_model_matches_control_tf():
    # Source: python-control control.tf(num, den, dt) (reference library)
    ev = parse_model("0.8*(z-0.9)/(z-1)", sample_time=0.01)
    ref = control.tf([0.8, -0.72], [1, -1], 0.01)
    assert ev.system.dt == 0.01
    assert_same_tf(ev.system, ref, rtol=1e-14)


def test_delay_is_returned_separately():
    # Source: python-control control.tf for the rational part (reference library); the delay
    # is the typed value in seconds.
    ev = parse_model("delay(0.002)*40/(0.05*s+1)")
    assert_same_tf(ev.system, control.tf([40], [0.05, 1]), rtol=1e-14)
    assert_allclose(ev.delay, 0.002, rtol=1e-15)
    ev2 = parse_model("-delay(tau)*K/(s+1)*delay(tau/2)", {"tau": 0.004, "K": 3.0})
    assert_allclose(ev2.delay, 0.006, rtol=1e-15)
    assert_same_tf(ev2.system, control.tf([-3.0], [1, 1]), rtol=1e-14)


def test_model_metadata_and_canonical_text():
    m = compile_model("Kt / (s*(J*s + b))")
    assert m.parameters == frozenset({"Kt", "J", "b"})
    assert m.variable == "s"
    assert compile_model("8/(s*(s+12))").canonical == compile_model(
        " 8.0 / ( s * ( s + 1.2e1 ) ) ").canonical
    assert compile_model("8/(s*(s+12))").canonical != compile_model("8/(s*(s+13))").canonical
    assert compile_model("s**2").canonical == compile_model("s ^ 2").canonical
    assert compile_model("0.8*(z-0.9)/(z-1)").variable == "z"


# (text, 0-based position of the offending character, words in the message)
SYNTAX_ERRORS = [
    ("2s", 1, "implicit multiplication"),
    ("(s+1)(s+2)", 5, "implicit multiplication"),
    ("s^-1", 2, "non-negative integer"),
    ("s^1.5", 2, "non-negative integer"),
    ("1e999/(s+1)", 0, "too large"),
    ("1/(s+1e)", 6, "malformed exponent"),
    ("foo(1)*s", 0, "unknown block 'foo'"),
    ("s+z", 2, "both s and z"),
    ("3*pid(1, 2)*z", 2, "continuous-time block"),
    ("delay(0.1)/z", 0, "continuous-time"),
    ("1/(s+delay(1))", 5, "sum"),
    ("(s+1)/delay(0.1)", 6, "denominator"),
    ("2j*s", 0, "complex"),
    ("((s+1)", 6, "')'"),
    ("s^2^3", 3, "chained"),
    ("x/", 2, "expected a number"),
    ("pid(1, 2, 3, 4, 5)", 16, "at most 4"),
    ("pid(kq=1)", 4, "no argument 'kq'"),
    ("pid(kp=1, 2)", 10, "positional"),
    ("pid(kp=1, kp=2)", 10, "twice"),
    ("lead(1, 2)", 9, "needs argument 'wp'"),
    ("notch(s, 0.1, 0.5)", 6, "no s, z or blocks"),
    ("1/(s+1) # note", 8, "unexpected character"),
    ("s\u00b2", 1, "unexpected character"),
    ("pid*s", 0, "call it as pid"),
    ("s+", 2, "end of text"),
    ("zpk([1], [2, 3])", 15, "gain"),
    ("ss([[0, 1], [-2, -3]], [[0], [1]], [[1, 0, 0]], [[0]])", 35, "matrix C"),
    ("ss([[0, 1], [-2]], [[0], [1]], [[1, 0]], [[0]])", 3, "square"),
    ("2*ss([[1]], [[1]], [[1]], [[0]])", 2, "whole model"),
    ("(s+1)^40*(s+2)^30", 8, "degree"),
    ("(" * 70 + "s" + ")" * 70, 60, "nesting"),
    ("", None, "empty"),
    ("   ", 0, "empty"),
    ("j*s", 0, "'j' alone"),
]


@pytest.mark.parametrize("text,pos,words", SYNTAX_ERRORS, ids=[e[0][:30] for e in SYNTAX_ERRORS])
def test_syntax_errors_point_at_the_offending_character(text, pos, words):
    # Positions counted by hand in each text (0-based).
    with pytest.raises(ModelSyntaxError, match=re.escape(words)) as info:
        compile_model(text)
    assert info.value.position == pos
    assert info.value.text == text


def test_text_length_limit():
    text = "1+" * 5000 + "s"
    with pytest.raises(ModelSyntaxError, match="longer than") as info:
        compile_model(text)
    assert info.value.position == 10_000


def test_long_flat_sum_does_not_exhaust_recursion():
    # 2,000 terms in one sum: the tree is n-ary, so evaluation depth stays small.
    # Source: closed form, 2000 * 1 = 2000 (arithmetic).
    ev = parse_model("+".join(["1"] * 2000))
    assert_allclose(monic(ev.system)[0], [2000.0], rtol=1e-15)


SEMANTIC_ERRORS = [
    ("0.8*(z-0.9)/(z-1)", None, None, "needs a sample time"),
    ("Kt/(s*(J*s+b))", {"Kt": 1.0, "J": 1.0}, None, "'b' has no value"),
    ("K/(s+1)", {"K": float("nan")}, None, "not finite"),
    ("K/(s+1)", {"K": "3"}, None, "real number"),
    ("1/(s-s)", None, None, "division by zero"),
    ("1/(a-1)", {"a": 1.0}, None, "division by zero"),
    ("1e99*1e99*1e99*1e99/(s+1)", None, None, "overflow"),  # 1e396 > float max (IEEE 754)
    ("zpk([1+1j], [-1, -2], 1)", None, None, "conjugate"),
    ("delay(-0.1)/(s+1)", None, None, "zero or positive"),
    ("1/(s+1)", None, -1.0, "positive number of seconds"),
]


@pytest.mark.parametrize("text,params,ts,words", SEMANTIC_ERRORS,
                         ids=[e[0] + "|" + e[3] for e in SEMANTIC_ERRORS])
def test_semantic_errors_are_model_errors(text, params, ts, words):
    with pytest.raises(ModelError, match=words):
        parse_model(text, params, sample_time=ts)


def test_no_nan_escapes_from_a_zero_over_zero_parameter_set():
    # 0/0 in a constant sub-expression is refused rather than producing NaN.
    with pytest.raises(ModelError):
        parse_model("(a/a)/(s+1)", {"a": 0.0})


def test_evaluate_batch_agrees_with_evaluate():
    # Two-method check: the vectorised evaluation against one evaluate() per variant.
    m = compile_model("delay(tau)*(Kt*notch(w0, 0.05, 0.7)/(s*(J*s+b)) + 1/(s+w0))")
    rng = np.random.default_rng(3)
    vals = {"Kt": rng.uniform(0.05, 0.2, 9), "J": rng.uniform(1e-5, 5e-5, 9),
            "b": rng.uniform(1e-4, 1e-3, 9), "w0": rng.uniform(200, 500, 9),
            "tau": rng.uniform(0, 0.01, 9)}
    num, den, delay = m.evaluate_batch(vals)
    assert num.shape == den.shape and num.shape[0] == 9
    for i in range(9):
        ev = m.evaluate({k: float(v[i]) for k, v in vals.items()})
        n, d = monic(ev.system)
        k = num.shape[1]
        assert_allclose(num[i], np.pad(n, (k - n.size, 0)), rtol=1e-13, atol=0)
        assert_allclose(den[i], np.pad(d, (k - d.size, 0)), rtol=1e-13, atol=0)
        assert_allclose(delay[i], ev.delay, rtol=0, atol=0)


def test_evaluate_batch_broadcasts_scalars_and_refuses_ss():
    m = compile_model("K/(s+a)")
    num, den, _ = m.evaluate_batch({"K": np.array([1.0, 2.0, 4.0]), "a": 3.0})
    # Source: closed form K/(s+a), monic denominator (arithmetic)
    assert_allclose(num, [[0, 1], [0, 2], [0, 4]], rtol=1e-15)
    assert_allclose(den, [[1, 3]] * 3, rtol=1e-15)
    with pytest.raises(ModelError, match="different lengths"):
        m.evaluate_batch({"K": np.ones(3), "a": np.ones(4)})
    with pytest.raises(ModelError, match="ss"):
        compile_model("ss([[1]], [[1]], [[1]], [[0]])").evaluate_batch({})


EQUIVALENT = ["8/(s*(s+12))", "8 / ( s * ( s + 12 ) )", "16/(2*s^2+24*s)",
              "zpk([], [0, -12], 8)", "8.0e0/(s^2+12*s)", "(8/s)/(s+12)"]


def test_digest_equal_for_equivalent_texts():
    digests = {system_digest(parse_model(t).system) for t in EQUIVALENT}
    # also equal to the system built directly with python-control (reference library)
    digests.add(system_digest(control.tf([8], [1, 12, 0])))
    assert len(digests) == 1


def test_digest_differs_for_different_systems():
    base = parse_model("8/(s*(s+12))").system
    others = [
        system_digest(parse_model("8/(s*(s+12.000001))").system),
        system_digest(parse_model("8.0001/(s*(s+12))").system),
        system_digest(base, delay=0.001),
        system_digest(parse_model("8/(z*(z+12))", sample_time=0.01).system),
        system_digest(parse_model("8/(s*(s+12)*(s+1000))").system),
    ]
    ref = system_digest(base)
    assert ref not in others
    assert len(set(others)) == len(others)
    assert len(ref) == 64


def test_is_proper():
    # Source: definition, deg num <= deg den (common practice, no source)
    assert is_proper(parse_model("1/(s+1)").system)
    assert is_proper(parse_model("(s+2)/(s+1)").system)
    assert not is_proper(parse_model("s^2/(s+1)").system)
    assert not is_proper(parse_model("pid(1, 1, 0.1, 0)").system)
    assert is_proper(parse_model("pid(1, 1, 0.1, 0.01)").system)
    assert is_proper(parse_model("ss([[1]], [[1]], [[1]], [[0]])").system)


# ---- property test -----------------------------------------------------------------------

_TOKENS = ["s", "z", "1", "2.5", ".5", "1e-3", "1e999", "pi", "j", "2j", "K", "J", "+", "-",
           "*", "/", "^", "**", "(", ")", "[", "]", ",", "=", " ", "pid", "notch", "delay",
           "zpk", "ss", "lead", "lowpass2", "gain", "0", "60", "#", "\u00e9", "e", "."]
_VALID = [v[0] for v in VALID] + [
    "pid(kp=2, ki=5, kd=0.01, tf=0.001)*notch(2*pi*60, 0.05, 0.7)*lowpass(1000)",
    "delay(0.002)*40/(0.05*s+1)", "0.8*(z-0.9)/(z-1)",
    "ss([[0, 1], [-2, -3]], [[0], [1]], [[1, 0]], [[0]])",
]
_ALLOWED = (ModelSyntaxError, ModelError)


def _check_never_escapes(text):
    try:
        m = compile_model(text)
    except _ALLOWED:
        return
    values = {p: 1.5 for p in m.parameters}
    for ts in (None, 0.01):
        try:
            ev = m.evaluate(values, sample_time=ts)
        except _ALLOWED:
            continue
        if isinstance(ev.system, control.TransferFunction):
            n, d = monic(ev.system)
            assert np.all(np.isfinite(n)) and np.all(np.isfinite(d))
        assert math.isfinite(ev.delay)


@settings(max_examples=300, deadline=500, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.sampled_from(_TOKENS), max_size=25).map("".join))
def test_property_random_token_strings(text):
    _check_never_escapes(text)


@st.composite
def _mutated(draw):
    text = draw(st.sampled_from(_VALID))
    for _ in range(draw(st.integers(1, 3))):
        i = draw(st.integers(0, len(text)))
        kind = draw(st.sampled_from(["insert", "delete", "replace"]))
        ch = draw(st.sampled_from(list("s z0123456789.+-*/^()[],=jeE_ap") + ["**", "pid("]))
        if kind == "insert":
            text = text[:i] + ch + text[i:]
        elif kind == "delete":
            text = text[:i] + text[i + 1:]
        else:
            text = text[:i] + ch + text[i + 1:]
    return text


@settings(max_examples=300, deadline=500, suppress_health_check=[HealthCheck.too_slow])
@given(_mutated())
def test_property_mutated_valid_models(text):
    _check_never_escapes(text)
