"""Plant families: parameter specs, corners, seeded samples, fidelity models."""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
import scipy.stats
from numpy.testing import assert_allclose

from ledger.engine.types import PlantFamily
from ledger.errors import ModelError
from ledger.systems import ParamSpec, build_family, compile_model


def monic(sys):
    num = np.trim_zeros(np.asarray(sys.num[0][0], dtype=float), "f")
    den = np.trim_zeros(np.asarray(sys.den[0][0], dtype=float), "f")
    return num / den[0], den / den[0]


def assert_same_tf(got, ref, rtol=1e-12):
    gn, gd = monic(got)
    rn, rd = monic(ref)
    assert gn.shape == rn.shape and gd.shape == rd.shape
    assert_allclose(gn, rn, rtol=rtol)
    assert_allclose(gd, rd, rtol=rtol, atol=0)


# Invented gantry axis: motor constant, moving inertia (plate load varies), viscous friction.
GANTRY = "Kt/(s*(J*s+b))"
GANTRY_PARAMS = {
    "Kt": 0.12,
    "J": {"nominal": 2.0e-3, "tol": "20 %"},
    "b": {"nominal": 1.0e-3, "tol": 2.0e-4},
}


# ---- ParamSpec -------------------------------------------------------------------------

def test_paramspec_forms():
    # Source: arithmetic on the given nominal and tolerance (common practice, no source)
    p = ParamSpec.from_value(2.5)
    assert (p.nominal, p.low, p.high, p.has_tolerance) == (2.5, 2.5, 2.5, False)
    p = ParamSpec.from_value({"nominal": 2.0e-3, "tol": "20 %"})
    assert_allclose([p.low, p.high], [1.6e-3, 2.4e-3], rtol=1e-14)
    p = ParamSpec.from_value({"nominal": -4.0, "tol": "10%"})
    assert_allclose([p.low, p.high], [-4.4, -3.6], rtol=1e-14)
    p = ParamSpec.from_value({"nominal": 3.0, "tol": 0.5})
    assert_allclose([p.low, p.high], [2.5, 3.5], rtol=1e-15)
    p = ParamSpec.from_value({"nominal": 3.0, "tol": "0.5"})
    assert_allclose([p.low, p.high], [2.5, 3.5], rtol=1e-15)
    p = ParamSpec.from_value({"nominal": 3.0, "low": 2.0, "high": 3.2,
                              "distribution": "normal"})
    assert (p.low, p.high, p.distribution) == (2.0, 3.2, "normal")
    assert_allclose(p.sigma, 1.0 / 3.0, rtol=1e-15)
    assert ParamSpec.from_value(p) is p


@pytest.mark.parametrize("value,words", [
    ({"nominal": 1.0, "tolerance": "5 %"}, "unknown parameter field 'tolerance'"),
    ({"tol": "5 %"}, "needs a 'nominal'"),
    ({"nominal": 1.0, "tol": 0.1, "low": 0.5, "high": 2.0}, "either 'tol'"),
    ({"nominal": 1.0, "low": 0.5}, "both 'low' and 'high'"),
    ({"nominal": 1.0, "tol": -0.1}, "zero or positive"),
    ({"nominal": 1.0, "tol": "-5 %"}, "not understood"),
    ({"nominal": 1.0, "tol": "five percent"}, "not understood"),
    ({"nominal": 1.0, "low": 1.5, "high": 2.0}, "low <= nominal <= high"),
    ({"nominal": 1.0, "tol": 0.1, "distribution": "cauchy"}, "distribution must be"),
    ({"nominal": float("inf")}, "finite"),
    (True, "must be a number"),
    ("3.0", "must be a number"),
])
def test_paramspec_errors(value, words):
    with pytest.raises(ModelError, match=words):
        ParamSpec.from_value(value)


# ---- corners ---------------------------------------------------------------------------

def test_nominal_and_corners():
    fam = build_family(GANTRY, GANTRY_PARAMS)
    assert isinstance(fam, PlantFamily)
    assert fam.names == ("nominal", "corner:J-,b-", "corner:J-,b+", "corner:J+,b-",
                         "corner:J+,b+")
    assert fam.variants[0].kind == "nominal"
    # Source: python-control control.tf with the corner values (reference library)
    for v in fam.variants:
        kt, j, b = v.params["Kt"], v.params["J"], v.params["b"]
        assert_same_tf(v.system, control.tf([kt], [j, b, 0]), rtol=1e-13)
    heavy = fam.variants[fam.names.index("corner:J+,b-")]
    assert_allclose([heavy.params["J"], heavy.params["b"]], [2.4e-3, 0.8e-3], rtol=1e-14)


@pytest.mark.parametrize("k", [0, 1, 3, 5])
def test_corner_count_is_two_to_the_k(k):
    names = [f"p{i}" for i in range(k)]
    text = "1/(s+1)" if not k else "1/(" + "+".join(f"{n}*s^{i + 1}" for i, n in
                                                  enumerate(names)) + "+1)"
    params = {n: {"nominal": 1.0, "tol": "10 %"} for n in names}
    fam = build_family(text, params)
    # Source: combinatorics, every low/high combination of k parameters is 2^k
    assert sum(v.kind == "corner" for v in fam.variants) == (2 ** k if k else 0)


def test_too_many_corners_refused():
    params = {n: {"nominal": 1.0, "tol": 0.1} for n in ("a", "b", "c")}
    with pytest.raises(ModelError, match="8 corners, more than max_corners=4"):
        build_family("a/(b*s+c)", params, max_corners=4)
    fam = build_family("a/(b*s+c)", params, corners=False, max_corners=4)
    assert fam.names == ("nominal",)


def test_missing_parameter_named():
    with pytest.raises(ModelError, match="'b'"):
        build_family(GANTRY, {"Kt": 0.1, "J": 1e-3})


# ---- samples ---------------------------------------------------------------------------

def test_samples_reproducible_and_inside_bounds():
    f1 = build_family(GANTRY, GANTRY_PARAMS, corners=False, samples=50, seed=7)
    f2 = build_family(GANTRY, GANTRY_PARAMS, corners=False, samples=50, seed=7)
    f3 = build_family(GANTRY, GANTRY_PARAMS, corners=False, samples=50, seed=8)
    assert f1.names[1:3] == ("sample:0001", "sample:0002") and len(f1) == 51
    j1 = np.array([v.params["J"] for v in f1.variants[1:]])
    j2 = np.array([v.params["J"] for v in f2.variants[1:]])
    j3 = np.array([v.params["J"] for v in f3.variants[1:]])
    assert_allclose(j1, j2, rtol=0, atol=0)  # same seed, identical draws
    assert not np.allclose(j1, j3)
    assert np.all((j1 >= 1.6e-3) & (j1 <= 2.4e-3))
    b1 = np.array([v.params["b"] for v in f1.variants[1:]])
    assert np.all((b1 >= 0.8e-3) & (b1 <= 1.2e-3))
    assert all(v.params["Kt"] == 0.12 for v in f1.variants)
    for v in f1.variants[1:6]:  # Source: python-control control.tf (reference library)
        assert_same_tf(v.system, control.tf([0.12], [v.params["J"], v.params["b"], 0]),
                       rtol=1e-13)


def test_sample_spread_matches_the_distribution():
    n = 3000
    params = {"a": {"nominal": 10.0, "tol": "30 %", "distribution": "normal"},
              "c": {"nominal": 5.0, "low": 4.0, "high": 7.0}}
    fam = build_family("a/(s+c)", params, corners=False, samples=n, seed=11)
    a = np.array([v.params["a"] for v in fam.variants[1:]])
    c = np.array([v.params["c"] for v in fam.variants[1:]])
    sigma = 3.0 / 3.0
    # Source: scipy.stats.truncnorm (reference library): a normal clipped at +-3 sigma keeps
    # almost all its mass; its standard deviation is truncnorm(-3, 3).std() * sigma (about
    # 0.987 sigma). Clipping (not truncating) moves 0.27 % of the mass to the bounds, which
    # changes the standard deviation by well under 1 %.
    want_std = scipy.stats.truncnorm(-3, 3).std() * sigma
    # generous bound: the standard error of a sample std is about sigma/sqrt(2n) = 1.3 %
    assert_allclose(a.std(ddof=1), want_std, rtol=0.06)
    assert_allclose(a.mean(), 10.0, atol=5 * sigma / math.sqrt(n))
    assert np.all((a >= 7.0) & (a <= 13.0))
    # Source: variance of a uniform distribution, (high - low)^2 / 12 (closed form)
    assert_allclose(c.std(ddof=1), 3.0 / math.sqrt(12), rtol=0.06)
    assert_allclose(c.mean(), 5.5, atol=5 * (3.0 / math.sqrt(12)) / math.sqrt(n))


# ---- fidelity, delay, discrete, state space ---------------------------------------------

def test_fidelity_variant_at_nominal_values():
    # Invented pipette voice-coil axis: reduced design model and full-order model with the
    # electrical pole (time constant te).
    params = {"Kf": 4.0, "m": {"nominal": 0.03, "tol": "20 %"}, "c": 0.9, "te": 4.0e-4}
    fam = build_family("Kf/(s*(m*s+c))", params,
                       fidelity={"full-order": "Kf/(s*(m*s+c)*(te*s+1))"})
    assert fam.names[-1] == "fidelity:full-order"
    fid = fam.variants[-1]
    assert fid.kind == "fidelity" and fid.params["m"] == 0.03
    # Source: python-control transfer-function arithmetic (reference library)
    ref = control.tf([4.0], [0.03, 0.9, 0]) * control.tf([1], [4.0e-4, 1])
    assert_same_tf(fid.system, ref, rtol=1e-13)
    assert len(fam) == 1 + 2 + 1
    with pytest.raises(ModelError, match="'L'"):
        build_family("Kf/(s*(m*s+c))", params, fidelity={"x": "Kf/(s*(m*s+c)*(L*s+1))"})


def test_delay_per_variant():
    # Invented plate-shaker speed loop: first-order motor with transport delay td.
    params = {"K": 50.0, "T": 0.08, "td": {"nominal": 0.003, "low": 0.002, "high": 0.005}}
    fam = build_family("delay(td)*K/(T*s+1)", params, samples=20, seed=2)
    assert_allclose([v.delay for v in fam.variants[:3]], [0.003, 0.002, 0.005], rtol=1e-15)
    assert all(v.delay == v.params["td"] for v in fam.variants)


def test_discrete_family_and_state_space_family():
    fam = build_family("k*(z-0.9)/(z-1)", {"k": {"nominal": 0.8, "tol": "10 %"}},
                       sample_time=0.001)
    assert all(v.system.dt == 0.001 for v in fam.variants)
    with pytest.raises(ModelError, match="sample time"):
        build_family("k*(z-0.9)/(z-1)", {"k": 0.8})
    # a continuous model stays continuous even when the loop's sample time is passed
    fam = build_family("k/(s+1)", {"k": {"nominal": 0.8, "tol": "10 %"}}, sample_time=0.001)
    assert all(v.system.dt == 0 for v in fam.variants)
    fam = build_family("ss([[-b/J]], [[1/J]], [[1]], [[0]])",
                       {"J": {"nominal": 2.0, "tol": 0.5}, "b": 1.0})
    assert fam.names == ("nominal", "corner:J-", "corner:J+")
    # Source: python-control control.ss (reference library)
    assert_allclose(fam.variants[2].system.A, control.ss([[-1 / 2.5]], [[1]], [[1]], 0).A,
                    rtol=1e-15)


def test_family_accepts_compiled_model_and_paramspec():
    m = compile_model(GANTRY)
    specs = {k: ParamSpec.from_value(v) for k, v in GANTRY_PARAMS.items()}
    assert build_family(m, specs).names == build_family(GANTRY, GANTRY_PARAMS).names
