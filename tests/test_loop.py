"""Loop assembly and exact ZOH discretisation."""

from __future__ import annotations

import control
import mpmath
import numpy as np
import pytest
import scipy.linalg
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from scipy.integrate import solve_ivp

from ledger.engine.discretize import split_delay, zoh_discretize
from ledger.engine.loop import PATHS, LoopSpec, assemble
from ledger.engine.types import PlantFamily, Variant
from ledger.errors import ModelError


def _freq_ss(b, v, x):
    """Frequency response of variant v of a delay-free SSBatch at complex points x."""
    n = b.A.shape[1]
    return np.array([b.C[v] @ np.linalg.solve(xi * np.eye(n) - b.A[v], b.B[v]) + b.D[v]
                     for xi in x])


PLANTS = [
    control.tf([1], [1, 1, 0]),
    control.tf([2, 3], [1, 3, 2, 0.5]),
    control.tf([1, -2], [1, 0.4, 9]),
    control.tf([0.5, 1, 2], [1, 2, 1]),  # biproper
]


def _exact_zoh(A, B, ts, dps=50):
    """ZOH matrices to ``dps`` digits: mpmath's matrix exponential of [[A, B], [0, 0]] ts."""
    n = A.shape[0]
    with mpmath.workdps(dps):
        M = mpmath.zeros(n + 1, n + 1)
        for i in range(n):
            for j in range(n):
                M[i, j] = mpmath.mpf(float(A[i, j])) * mpmath.mpf(ts)
            M[i, n] = mpmath.mpf(float(B[i])) * mpmath.mpf(ts)
        E = mpmath.expm(M)
        return E[:n, :n], E[:n, n]


def _mp_response(A, B, C, D, z, dps=50):
    """C (zI - A)^-1 B + D evaluated in ``dps``-digit arithmetic (A, B may be mpmath or numpy)."""
    with mpmath.workdps(dps):
        A = mpmath.matrix(A.tolist() if isinstance(A, np.ndarray) else A)
        B = mpmath.matrix(B.tolist() if isinstance(B, np.ndarray) else B)
        C = mpmath.matrix([[float(c) for c in C]])
        n = A.rows
        out = []
        for zi in z:
            x = mpmath.lu_solve(mpmath.mpc(zi) * mpmath.eye(n) - A, B)
            out.append(complex((C * x)[0, 0] + float(D)))
        return np.array(out)


@pytest.mark.parametrize("G", PLANTS)
@pytest.mark.parametrize("ts", [0.01, 0.3])
def test_zoh_matches_exact_matrix_exponential(G, ts):
    # Source: the exact ZOH equivalent Phi = exp(A Ts), Gamma = int_0^Ts exp(A s) ds B, taken from
    # one exponential of the block matrix [[A, B], [0, 0]] Ts (C. Van Loan, "Computing integrals
    # involving the matrix exponential", IEEE Trans. Automatic Control 23(3), 1978), evaluated by
    # mpmath to 50 digits.  Tolerances come from each case's conditioning, not from one machine:
    # the engine's double-precision exponential is accurate to a few eps times ||exp(M)|| ||M||,
    # and the transfer-function error is bounded to first order by
    # |dH| <= ||C R|| ||dPhi|| ||R Gamma|| + ||C R|| ||dGamma||, with R = (zI - Phi)^-1.
    S = control.ss(G)
    A, B, C, D = S.A, S.B[:, 0], S.C[0], S.D[0, 0]
    Ad, Bd, Cd, Dd = zoh_discretize(A, B, C, D, ts)
    assert_allclose(Cd, C, rtol=0, atol=0)
    assert Dd == D
    Phi_x, Gam_x = _exact_zoh(A, B, ts)
    Phi = np.array(Phi_x.tolist(), dtype=float)
    Gam = np.array(Gam_x.tolist(), dtype=float)[:, 0]
    eps = np.finfo(float).eps
    M = np.block([[A * ts, B[:, None] * ts], [np.zeros((1, A.shape[0] + 1))]])
    scale = np.linalg.norm(scipy.linalg.expm(M), 1) * max(1.0, np.linalg.norm(M, 1))
    tol = 64 * eps * scale
    assert np.max(np.abs(Ad - Phi)) <= tol
    assert np.max(np.abs(Bd - Gam)) <= tol
    z = np.exp(1j * np.array([0.05, 0.7, 3.0, 0.9 * np.pi / ts]) * ts)
    mine = _mp_response(Ad, Bd, Cd, Dd, z)
    exact = _mp_response(Phi_x, Gam_x, C, D, z)
    for zi, hm, hx in zip(z, mine, exact):
        R = np.linalg.inv(zi * np.eye(A.shape[0]) - Phi)
        bound = (np.linalg.norm(C @ R) * tol * np.sqrt(A.shape[0]) * np.linalg.norm(R @ Gam)
                 + np.linalg.norm(C @ R) * tol * np.sqrt(A.shape[0]))
        assert abs(hm - hx) <= 2 * bound + 4 * eps * abs(hx), (zi, hm, hx, bound)


@pytest.mark.parametrize("delay", [0.0, 0.037, 0.1, 0.262])
def test_fractional_delay_zoh_matches_fine_simulation(delay):
    # Source: independent reference -- the continuous plant integrated by scipy solve_ivp
    # (rtol 1e-11) under the delayed, held input; compared at the sample instants.
    ts = 0.1
    A = np.array([[0.0, 1.0], [-4.0, -0.6]])
    B = np.array([0.0, 4.0])
    C = np.array([1.0, 0.5])
    D = 0.25
    Ad, Bd, Cd, Dd = zoh_discretize(A, B, C, D, ts, delay)
    rng = np.random.default_rng(7)
    u = rng.normal(size=30)
    # discrete simulation
    xd = np.zeros(Ad.shape[0])
    yd = []
    for k in range(u.size):
        yd.append(Cd @ xd + Dd * u[k])
        xd = Ad @ xd + Bd * u[k]

    def v_at(t):  # held and delayed input, right-continuous
        k = int(np.floor((t - delay) / ts + 1e-12))
        return u[k] if 0 <= k < u.size else 0.0

    switches = sorted({k * ts + delay for k in range(u.size)} | {k * ts for k in range(u.size)})
    x = np.zeros(2)
    yc = []
    t_prev = 0.0
    samples = iter(k * ts for k in range(u.size))
    t_next = next(samples)
    for t_sw in switches + [u.size * ts]:
        while t_next is not None and t_next <= t_sw + 1e-12:
            if t_next > t_prev + 1e-15:
                vv = v_at(0.5 * (t_prev + t_next))
                sol = solve_ivp(lambda t, s: A @ s + B * vv, (t_prev, t_next), x,
                                rtol=1e-11, atol=1e-13, method="DOP853")
                x, t_prev = sol.y[:, -1], t_next
            yc.append(C @ x + D * v_at(t_next))
            t_next = next(samples, None)
        if t_sw > t_prev + 1e-15:
            vv = v_at(0.5 * (t_prev + t_sw))
            sol = solve_ivp(lambda t, s: A @ s + B * vv, (t_prev, t_sw), x,
                            rtol=1e-11, atol=1e-13, method="DOP853")
            x, t_prev = sol.y[:, -1], t_sw
    assert_allclose(yd, yc[:len(yd)], rtol=1e-7, atol=1e-9)


def test_split_delay():
    # Source: definition (delay = m Ts + frac); common practice, no source.
    assert split_delay(0.25, 0.1) == (2, pytest.approx(0.05, rel=1e-12))
    assert split_delay(0.3, 0.1) == (3, 0.0)  # 0.3/0.1 rounding snapped to whole samples


def test_closed_loop_paths_match_reference_library():
    # Source: reference library, control.feedback/series (python-control 0.10.2).
    G = control.tf([3, 1], [1, 2.5, 4, 0.2])
    C = control.tf([2, 1], [0.05, 1])
    H = control.tf([1], [0.01, 1])
    F = control.tf([1], [0.2, 1])
    asm = assemble(PlantFamily.single(G), C, LoopSpec(sensor=H, prefilter=F))
    g = asm.groups[0]
    ref = {
        "r->y": F * control.feedback(C * G, H),
        "r->e": F * control.feedback(1, C * G * H),
        "r->u": F * control.feedback(C, G * H),
        "d->y": control.feedback(G, C * H),
        "n->u": -control.feedback(C, G * H),
    }
    s = 1j * np.array([0.01, 0.5, 2.0, 30.0])
    for name in PATHS:
        assert_allclose(_freq_ss(g.paths[name], 0, s), ref[name](s), rtol=1e-9, err_msg=name)
    # closed-loop poles are those of the interconnection (reference: feedback poles)
    ref_poles = np.sort_complex(control.feedback(C * G, H).poles())
    assert_allclose(np.sort_complex(g.poles[0]), ref_poles, rtol=1e-8)


def test_sensitivity_identities_on_grid():
    # Source: definitions S = 1/(1+L), T = L/(1+L), hence S + T = 1 (common practice, no source).
    G = control.tf([1], [1, 1, 0])
    C = control.tf([4, 2], [0.1, 1])
    fam = PlantFamily((Variant("nominal", "nominal", G),
                       Variant("slow", "corner", control.tf([1], [2, 1, 0]), delay=0.02)))
    asm = assemble(fam, C, LoopSpec(input_delay=0.01))
    w = np.logspace(-3, 3, 200)
    for g in asm.groups:
        S, T = g.closed["S"].evaluate(w), g.closed["T"].evaluate(w)
        assert_allclose(S + T, np.ones_like(S), rtol=1e-12, atol=1e-12)
        L = g.loop_gain.evaluate(w)
        assert_allclose(S, 1.0 / (1.0 + L), rtol=1e-12)
        assert_allclose(g.closed["CS"].evaluate(w), C(1j * w)[None, :] * S, rtol=1e-12)


def test_delay_bookkeeping_per_path():
    # Source: delays commute round a SISO loop (common practice, no source): loop delay is the
    # sum, r->y carries input + plant delay, d->y the plant delay only.
    G = control.tf([1], [1, 1])
    fam = PlantFamily((Variant("nominal", "nominal", G, delay=0.03),))
    asm = assemble(fam, 2.0, LoopSpec(input_delay=0.01, output_delay=0.005))
    g = asm.groups[0]
    assert_allclose(g.tau, 0.045, rtol=1e-12)
    assert_allclose(g.paths["r->y"].io_delay, 0.04, rtol=1e-12)
    assert_allclose(g.paths["d->y"].io_delay, 0.03, rtol=1e-12)
    assert g.paths["r->u"].io_delay == 0.0
    # delayed internal system reproduces C G e^{-s tau} / (1 + ...) at s = j w
    b = g.paths["r->y"]
    for w in (0.3, 4.0):
        s = 1j * w
        n = b.A.shape[1]
        # w-channel closed through e^{-s tau}: solve the frequency-domain LFT
        M = s * np.eye(n) - b.A[0]
        Pzu = b.Cz[0] @ np.linalg.solve(M, b.B[0]) + b.Dz[0]
        Pzw = b.Cz[0] @ np.linalg.solve(M, b.Bw[0]) + b.Dzw[0]
        Pyu = b.C[0] @ np.linalg.solve(M, b.B[0]) + b.D[0]
        Pyw = b.C[0] @ np.linalg.solve(M, b.Bw[0]) + b.Dw[0]
        dly = np.exp(-s * g.tau)
        internal = Pyu + Pyw * dly * Pzu / (1 - Pzw * dly)
        L = 2.0 * G(s) * np.exp(-s * 0.045)
        expect = 2.0 * G(s) * np.exp(-s * 0.04) / (1 + L)
        assert_allclose(internal * np.exp(-s * b.io_delay), expect, rtol=1e-12)


def test_family_grouped_by_order():
    # Source: reference library (control.feedback poles) per variant.
    tm, te, K = 0.03, 0.0004, 200.0
    red = control.tf([K], [tm, 1, 0])
    full = control.tf([K], np.polymul([tm, 1, 0], [te, 1]))
    fam = PlantFamily((Variant("nominal", "nominal", red),
                       Variant("fidelity:full-order", "fidelity", full)))
    C = control.tf([0.5, 5], [0.002, 1])
    asm = assemble(fam, C)
    assert len(asm.groups) == 2
    for g, G in zip(asm.groups, (red, full)):
        assert_allclose(np.sort_complex(g.poles[0]),
                        np.sort_complex(control.feedback(C * G).poles()), rtol=1e-8)


def test_digital_loop_discrete_plant_used_as_is():
    # Source: reference library, control.feedback of the discrete loop.
    ts = 0.05
    Gd = control.sample_system(control.tf([1], [1, 1, 0]), ts, "zoh")
    Cd = control.tf([2.0, -1.8], [1, -0.5], ts)
    asm = assemble(PlantFamily.single(Gd), Cd, LoopSpec(sample_time=ts))
    ref = control.feedback(Cd * Gd)
    assert_allclose(np.sort_complex(asm.groups[0].poles[0]), np.sort_complex(ref.poles()),
                    rtol=1e-8)


def test_refusals():
    # Source: product rules (refuse clearly); common practice, no source.
    G = control.tf([1], [1, 1])
    with pytest.raises(ModelError, match="derivative filter"):
        assemble(PlantFamily.single(G), control.tf([1, 0], [1]))
    with pytest.raises(ModelError, match="sample_time"):
        LoopSpec(sample_time=0.0)
    with pytest.raises(ModelError, match="input_delay"):
        LoopSpec(input_delay=-0.1)
    with pytest.raises(ModelError, match="input_delay"):
        LoopSpec(input_delay=float("nan"))
    Gd = control.tf([1], [1, -0.5], 0.1)
    with pytest.raises(ModelError, match="dt=0.1 s but the loop sample_time is 0.2"):
        assemble(PlantFamily.single(Gd), control.tf([1], [1, 0.1], 0.2), LoopSpec(sample_time=0.2))
    with pytest.raises(ModelError, match="give it in z"):
        assemble(PlantFamily.single(G), control.tf([1, 1], [0.1, 1]), LoopSpec(sample_time=0.1))
    with pytest.raises(ModelError, match="algebraic loop"):
        assemble(PlantFamily.single(control.tf([1, 0], [1, 1])), -1.0)
    with pytest.raises(ModelError, match="discrete"):
        assemble(PlantFamily.single(Gd), 1.0)


def test_tustin_controller_accepted_when_asked():
    # Source: reference library, control.sample_system(C, Ts, 'tustin') then feedback.
    ts = 0.01
    G = control.tf([1], [1, 1, 0])
    C = control.tf([1, 1], [0.1, 1])
    asm = assemble(PlantFamily.single(G), C,
                   LoopSpec(sample_time=ts, controller_discretization="tustin"))
    ref = control.feedback(control.sample_system(C, ts, "tustin")
                           * control.sample_system(G, ts, "zoh"))
    assert_allclose(np.sort_complex(asm.groups[0].poles[0]), np.sort_complex(ref.poles()),
                    rtol=1e-8)


def test_digital_disturbance_enters_after_controller_delays():
    # Source: reference library -- control.sample_system(G, Ts, 'zoh') and control.feedback:
    # with a computation delay of 2 samples the disturbance reaches the plant directly,
    # d->y = Gd / (1 + C z^-2 Gd), while r->y = C z^-2 Gd / (1 + C z^-2 Gd).
    ts = 0.01
    G = control.tf([4.0], [1, 1.5, 0])
    Gd = control.sample_system(G, ts, "zoh")
    Cd = control.tf([3.0, -2.7], [1, -0.4], ts)
    z2 = control.tf([1], [1, 0, 0], ts)
    asm = assemble(PlantFamily.single(G), Cd, LoopSpec(sample_time=ts, computation_delay=2))
    g = asm.groups[0]
    z = np.exp(1j * np.array([0.1, 3.0, 40.0, 250.0]) * ts)
    assert_allclose(_freq_ss(g.paths["d->y"], 0, z), control.feedback(Gd, Cd * z2)(z),
                    rtol=1e-9)
    assert_allclose(_freq_ss(g.paths["r->y"], 0, z), control.feedback(Cd * z2 * Gd)(z),
                    rtol=1e-9)


def test_static_plant_and_discrete_plant_with_whole_sample_delay():
    # Source: reference library -- control.feedback of the same discrete loop with z^-2.
    ts = 0.1
    asm = assemble(PlantFamily.single(control.tf(0.5, 1)), control.tf([1], [1, -1], ts),
                   LoopSpec(sample_time=ts))
    ref = control.feedback(control.tf([0.5], [1, -1], ts))
    assert_allclose(np.sort_complex(asm.groups[0].poles[0]), np.sort_complex(ref.poles()),
                    rtol=1e-10)
    Gd = control.tf([0.2], [1, -0.9], ts)
    fam = PlantFamily((Variant("nominal", "nominal", Gd, delay=0.2),))
    asm = assemble(fam, control.tf(0.8, 1), LoopSpec(sample_time=ts))
    ref = control.feedback(0.8 * Gd * control.tf([1], [1, 0, 0], ts))
    poles = asm.groups[0].poles[0]
    # the disturbance has its own 2-sample delay line (the plant delay): two poles at z = 0
    # that r cannot reach
    assert np.sum(poles == 0) == 2
    assert_allclose(np.sort_complex(poles[poles != 0]), np.sort_complex(ref.poles()),
                    rtol=1e-8)
    with pytest.raises(ModelError, match="not whole samples"):
        assemble(PlantFamily((Variant("nominal", "nominal", Gd, delay=0.15),)), 0.8,
                 LoopSpec(sample_time=ts))


@settings(max_examples=25, deadline=None)
@given(p1=st.floats(0.1, 20.0), p2=st.floats(0.1, 20.0), z1=st.floats(0.05, 30.0),
       k=st.floats(0.05, 50.0), zc=st.floats(0.1, 10.0), pc=st.floats(5.0, 200.0),
       sign=st.sampled_from([1.0, -1.0]))
def test_random_loops_match_reference_library(p1, p2, z1, k, zc, pc, sign):
    # Source: reference library -- control.feedback poles and frequency responses of the
    # same loop, for random second-order plants with a zero and random lead controllers.
    G = control.tf([sign * k, sign * k * z1], np.polymul([1, p1], [1, -p2 * 0.1]))
    C = control.tf([1 / zc, 1], [1 / pc, 1])
    g = assemble(PlantFamily.single(G), C).groups[0]
    ref = control.feedback(C * G)
    mine, theirs = g.poles[0], ref.poles()
    assert mine.size == theirs.size
    # each reference pole has one of ours next to it (order-free comparison)
    gap = np.min(np.abs(mine[:, None] - theirs[None, :]), axis=0)
    assert_allclose(gap, 0.0, atol=1e-7 * max(1.0, np.max(np.abs(theirs))))
    s = 1j * np.array([0.01, 1.0, 30.0])
    assert_allclose(_freq_ss(g.paths["r->y"], 0, s), ref(s), rtol=1e-8, atol=1e-12)


def test_digital_loop_gain_with_delays_matches_reference_library():
    # Source: reference library -- L(z) = C(z) z^-(d+m) Gzoh(z) with control.sample_system,
    # for whole-sample delays; for a fractional delay, the zero/pole/gain form used for L must
    # agree with the block's own state-space resolvent (two-method check).
    ts = 0.01
    G = control.tf([1], [1, 1, 0])
    Cd = control.tf([3.0, -2.7], [1, -0.4], ts)
    asm = assemble(PlantFamily.single(G), Cd,
                   LoopSpec(sample_time=ts, computation_delay=1, input_delay=0.02))
    w = np.array([0.05, 1.0, 20.0, 300.0])
    z = np.exp(1j * w * ts)
    ref = Cd * control.tf([1], [1, 0, 0, 0], ts) * control.sample_system(G, ts, "zoh")
    assert_allclose(asm.groups[0].loop_gain.evaluate(w)[0], ref(z), rtol=1e-9)
    asm = assemble(PlantFamily.single(G), Cd,
                   LoopSpec(sample_time=ts, computation_delay=1, input_delay=0.013))
    Gb = asm.groups[0].blocks[1][0]
    resolvent = np.array([Gb.C @ np.linalg.solve(zi * np.eye(Gb.order) - Gb.A, Gb.B) + Gb.D
                          for zi in z])
    assert_allclose(Gb(z), resolvent, rtol=1e-9)


def test_digital_velocity_constant():
    # Source: static velocity error constant of a sampled loop, Kv = lim_{z->1} (z-1) L(z)/Ts
    # (Ogata, Discrete-Time Control Systems, 2nd ed. -- from memory, section not checked); the ZOH keeps
    # lim s G(s), so K/(s(s+1)) with gain 2 has Kv = 2 at any Ts and any loop delay.
    from ledger.engine import measure
    G = control.tf([1], [1, 1, 0])
    for ts, delay in ((0.01, 0.013), (0.1, 0.0), (0.05, 0.27)):
        m = measure(G, 2.0, ["system_type", "velocity_constant", "ramp_error"],
                    sample_time=ts, computation_delay=1, delay=delay)
        assert m["system_type"] == 1.0
        assert_allclose(m["velocity_constant"], 2.0, rtol=1e-9)
        assert_allclose(m["ramp_error"], 0.5, rtol=1e-9)


def test_make_blocks_batched_realisation_matches_references():
    """Batched realisation of a parametric family: roots agree with numpy.roots, frequency
    responses with python-control's own evaluation of each transfer function.

    Source: reference libraries (numpy.roots; control.TransferFunction.__call__)."""
    from ledger.engine.loop import make_blocks

    rng = np.random.default_rng(7)
    systems = []
    for _ in range(40):
        k, tm, te = rng.uniform(100, 200), rng.uniform(0.02, 0.04), rng.uniform(2e-4, 6e-4)
        systems.append(control.tf([k], [tm, 1, 0]))
        systems.append(control.tf([k * te, k], [tm * te, tm + te, 1, 0]))
    systems.append(control.tf([1, -1, 0], [1, 4, 5, 2]))   # zero at 0 and a biproper-free mix
    systems.append(2.5)                                    # static gain: the one-by-one path
    blocks = make_blocks(systems, [f"v{i}" for i in range(len(systems))])
    s = np.array([0.3j, 7j, 120j, 4e3j])
    for sys, b in zip(systems, blocks):
        if isinstance(sys, float):
            assert b.order == 0 and b.D == 2.5
            continue
        num, den = sys.num[0][0], sys.den[0][0]
        # rtol 1e-12: the same companion-matrix eigenproblem, solved in one stacked call
        assert_allclose(np.sort_complex(b.poles), np.sort_complex(np.roots(den).astype(complex)),
                        rtol=1e-12, atol=1e-12)
        assert_allclose(np.sort_complex(b.zeros), np.sort_complex(np.roots(num).astype(complex)),
                        rtol=1e-12, atol=1e-12)
        n = b.order
        h = np.array([b.C @ np.linalg.solve(x * np.eye(n) - b.A, b.B) + b.D for x in s])
        # rtol 1e-12: a balanced realisation of the same rational function
        assert_allclose(h, sys(s), rtol=1e-12)
