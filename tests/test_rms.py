"""rms budgets from spectra (ledger/engine/rms.py, ledger/engine/spectra.py) against closed
forms, scipy's Lyapunov solvers on loops python-control closes, and direct PSD integration
(scipy.integrate.quad).  Tolerances: exact references at 1e-9 relative (the Lyapunov solve of
a well-conditioned loop of order <= 5); quadrature references at the tolerance quad reports."""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.integrate import quad
from scipy.linalg import solve_discrete_lyapunov

from ledger.engine import measure
from ledger.engine.loop import LoopSpec
from ledger.engine.rms import rms_budget, rms_curve
from ledger.engine.spectra import Spectrum, parse_psd_table, psd_at
from ledger.engine.types import PlantFamily, Variant
from ledger.errors import ModelError


def _gain2(sys, f):
    """|sys(j 2 pi f)|^2 by python-control (the reference evaluation)."""
    return float(np.abs(sys(2j * math.pi * f)) ** 2)


def _psd_integral(sys, phi0, W=None):
    """int_0^inf |sys W|^2 phi0 df by adaptive quadrature (split at the decades)."""
    g = sys if W is None else sys * W
    edges = [0.0] + list(np.logspace(-4, 6, 41))
    total = 0.0
    for a, b in zip(edges[:-1], edges[1:]):
        total += quad(lambda f: phi0 * _gain2(g, f), a, b, epsabs=0, epsrel=1e-12,
                      limit=200)[0]
    # the tail above 1e6 Hz with f = 1/t
    total += quad(lambda t: phi0 * _gain2(g, 1.0 / t) / t ** 2, 0.0, 1e-6, epsabs=0,
                  epsrel=1e-12, limit=200)[0]
    return total


def test_first_order_white_noise_sigma2_is_q_over_2a():
    # x' = -a x + w with E[w(t) w(t+s)] = q delta(s): sigma^2 = q / (2 a) (common textbook
    # result, e.g. any random-process text; from memory).  Here the closed loop of
    # 1/(s + a0) under proportional gain k driven at the plant input is 1/(s + a), a = a0 + k;
    # the engine's intensity is the one-sided PSD, 2 q.
    a0, k, q = 2.0, 3.0, 0.7
    a = a0 + k
    sp = Spectrum("input_disturbance", intensity=2 * q)
    m = measure(control.tf([1], [1, a0]), k, ["rms_error", "rms_effort"], spectra=(sp,))
    assert_allclose(m["rms_error"] ** 2, q / (2 * a), rtol=1e-12)
    # u = -k y: effort variance k^2 sigma^2 (same closed form)
    assert_allclose(m["rms_effort"] ** 2, k * k * q / (2 * a), rtol=1e-12)
    m3 = measure(control.tf([1], [1, a0]), k, ["rms_error"], spectra=(sp,), sigmas=3)
    assert_allclose(m3["rms_error"], 3 * math.sqrt(q / (2 * a)), rtol=1e-12)


@pytest.mark.parametrize("zeta, wn", [(0.05, 30.0), (0.3, 2.0), (0.7, 100.0)])
def test_second_order_resonance_h2_closed_form(zeta, wn):
    # ||1/(s^2 + 2 zeta wn s + wn^2)||_2^2 = 1/(4 zeta wn^3) (closed form of the H2 norm of a
    # second-order system, from memory), checked independently by quadrature of the PSD.
    # Loop: plant 1/(s (s + 2 zeta wn)) under gain wn^2; input disturbance -> y is that system.
    phi0 = 1e-3
    G = control.tf([1], [1, 2 * zeta * wn, 0])
    sp = Spectrum("input_disturbance", intensity=phi0)
    m = measure(G, wn ** 2, ["rms_error"], spectra=(sp,))
    exact = phi0 / 2 / (4 * zeta * wn ** 3)
    assert_allclose(m["rms_error"] ** 2, exact, rtol=1e-10)
    cl = control.tf([1], [1, 2 * zeta * wn, wn ** 2])
    assert_allclose(_psd_integral(cl, phi0), exact, rtol=1e-8)


def _pid_loop():
    G = control.tf([2.0], [0.05, 1.1, 1.0, 0.0])          # third order, one integrator
    K = control.tf([1.0, 10.0, 4.0], [0.002, 1.0, 0.0])   # PID with a derivative filter
    W = control.tf([1.0], [1 / (2 * math.pi * 50.0), 1.0])  # 50 Hz first-order roll-off
    return G, K, W


def test_lyapunov_against_direct_psd_integration_every_path():
    # Reference: the loop closed by python-control (control.feedback) and the PSD integrated
    # by scipy.integrate.quad; the engine solves solve_continuous_lyapunov on its own loop.
    G, K, W = _pid_loop()
    phi = {"sensor_noise": 4e-8, "input_disturbance": 2e-2, "output_disturbance": 1e-7}
    S = control.feedback(1, K * G)
    paths = {  # source -> (to y, to u)
        "sensor_noise": (-control.feedback(G * K, 1), -control.feedback(K, G)),
        "input_disturbance": (control.feedback(G, K), -control.feedback(K * G, 1)),
        "output_disturbance": (S, -K * S),
    }
    spectra = tuple(Spectrum(s, intensity=v, shaping=W) for s, v in phi.items())
    lp = LoopSpec(spectra=spectra)
    by = rms_budget(G, K, lp, output="y")
    bu = rms_budget(G, K, lp, output="u")
    for sb_y, sb_u in zip(by.sources, bu.sources):
        to_y, to_u = paths[sb_y.source]
        assert_allclose(sb_y.variance[0], _psd_integral(control.minreal(to_y, verbose=False),
                                                        phi[sb_y.source], W), rtol=1e-7)
        assert_allclose(sb_u.variance[0], _psd_integral(control.minreal(to_u, verbose=False),
                                                        phi[sb_u.source], W), rtol=1e-7)
    m = measure(G, K, ["rms_error", "rms_effort"], spectra=spectra)
    # independent sources: powers add
    assert_allclose(m["rms_error"] ** 2, sum(s.variance[0] for s in by.sources), rtol=1e-12)
    assert_allclose(m["rms_effort"] ** 2, sum(s.variance[0] for s in bu.sources), rtol=1e-12)


def test_white_noise_through_a_feedthrough_is_infinite():
    # White sensor noise reaches u through the controller's direct feedthrough: the variance
    # of u is infinite (common practice, no source: white noise has infinite power).
    G = control.tf([1], [1, 1, 0])
    m = measure(G, control.tf([2, 1], [0.01, 1]), ["rms_effort"],
                spectra=(Spectrum("sensor_noise", intensity=1e-6),))
    assert m["rms_effort"] == math.inf


def test_measured_error_includes_the_sensor_noise():
    # e = -(y + n): for white-noise-free output paths (n shaped), var(e) = int |S W|^2 phi
    # (e = -n/(1 + L)); reference: quad of python-control's S.
    G, K, W = _pid_loop()
    sp = Spectrum("sensor_noise", intensity=1e-6, shaping=W)
    m = measure(G, K, ["rms_error"], spectra=(sp,), error="measured")
    S = control.feedback(1, K * G)
    assert_allclose(m["rms_error"] ** 2, _psd_integral(S, 1e-6, W), rtol=1e-7)


def test_tabulated_psd_converges_to_the_exact_rational_value():
    # Rows sampled from the rational spectrum phi0 |W|^2, log-log interpolated: the
    # integral approaches the exact Lyapunov value as the table gets denser (second order in
    # the row spacing); the table spans 1e-4 .. 1e5 Hz, whose tails hold < 1e-7 of the power.
    G, K, W = _pid_loop()
    phi0 = 1e-6
    exact_sp = Spectrum("sensor_noise", intensity=phi0, shaping=W)
    exact = measure(G, K, ["rms_error"], spectra=(exact_sp,))["rms_error"]
    errs = []
    for rows in (20, 80, 320, 1280):
        f = np.logspace(-4, 5, rows)
        psd = phi0 * np.abs(W(2j * math.pi * f)) ** 2
        tab = Spectrum("sensor_noise", frequencies=tuple(f), psd=tuple(psd))
        b = rms_budget(G, K, LoopSpec(spectra=(tab,)))
        # the integration error estimate holds for the interpolated table itself
        assert b.sources[0].error[0] <= 1e-8 * b.sources[0].variance[0]
        errs.append(abs(math.sqrt(b.variance[0]) - exact) / exact)
    assert errs[-1] < 1e-4
    assert all(e2 < e1 for e1, e2 in zip(errs, errs[1:]))


def test_table_integration_of_a_flat_psd_matches_quadrature():
    # A flat PSD between two frequencies, through a lightly damped loop: the engine's
    # adaptive Simpson on the log grid against scipy quad of the same band-limited integrand.
    zeta, wn = 0.02, 2 * math.pi * 20
    G = control.tf([1], [1, 2 * zeta * wn, 0])
    phi0 = 3e-3
    tab = Spectrum("input_disturbance", frequencies=(1.0, 200.0), psd=(phi0, phi0))
    b = rms_budget(G, wn ** 2, LoopSpec(spectra=(tab,)))
    cl = control.tf([1], [1, 2 * zeta * wn, wn ** 2])
    ref = sum(quad(lambda f: phi0 * _gain2(cl, f), a, c, epsabs=0, epsrel=1e-12, limit=400)[0]
              for a, c in ((1.0, 19.0), (19.0, 21.0), (21.0, 200.0)))
    assert_allclose(b.variance[0], ref, rtol=1e-7)


def test_digital_loop_against_solve_discrete_lyapunov():
    # Reference: the discrete loop closed by python-control, its variance from
    # scipy.linalg.solve_discrete_lyapunov; white sequence of variance q / (2 Ts).
    ts = 1e-3
    Gc = control.tf([1.0], [0.02, 1.0, 0.0])
    Gd = control.sample_system(Gc, ts, method="zoh")
    Kd = control.tf([2.0, -1.8], [1.0, -0.5], ts)
    q = 1e-6
    Wd = control.tf([0.2], [1.0, -0.8], ts)
    spectra = (Spectrum("sensor_noise", intensity=q, shaping=Wd),
               Spectrum("input_disturbance", intensity=1e-2))
    m = measure(Gd, Kd, ["rms_error", "rms_effort"], sample_time=ts, spectra=spectra)

    def dvar(sys, scale):
        # the variance and an error bound for it: a Lyapunov solve loses accuracy in
        # proportion to cond(I - A kron A) (standard perturbation result for the Stein
        # equation, from memory), which here reaches about 1e11 because the closed-loop
        # poles lie at radius 0.9996; the bound is 100 eps cond |value|
        s = control.ss(sys)
        P = solve_discrete_lyapunov(s.A, s.B @ s.B.T)
        v = scale * float((s.C @ P @ s.C.T + s.D @ s.D.T)[0, 0])
        n = s.A.shape[0]
        cond = np.linalg.cond(np.eye(n * n) - np.kron(s.A, s.A))
        return v, 100 * np.finfo(float).eps * cond * abs(v)

    n_y = -control.feedback(Gd * Kd, 1) * Wd
    n_u = -control.feedback(Kd, Gd) * Wd
    d_y = control.feedback(Gd, Kd)
    d_u = -control.feedback(Kd * Gd, 1)
    (a, ea), (b, eb) = dvar(n_y, q / (2 * ts)), dvar(d_y, 1e-2 / (2 * ts))
    (c, ec), (d, ed) = dvar(n_u, q / (2 * ts)), dvar(d_u, 1e-2 / (2 * ts))
    # the bounds come from the conditioning of each path, so they hold on any BLAS kernel
    assert abs(m["rms_error"] ** 2 - (a + b)) <= ea + eb
    assert abs(m["rms_effort"] ** 2 - (c + d)) <= ec + ed
    # and they are tight enough to mean something: under 1e-3 relative
    assert (ea + eb) / (a + b) < 1e-3 and (ec + ed) / (c + d) < 1e-3


def test_digital_loop_against_a_long_simulation():
    # A seeded simulation of the difference equations (numpy, 400,000 samples): the sample
    # variance of y agrees within 2 % (its standard error here is about 0.5 %).
    ts = 1e-3
    a_, b_ = 0.9, 0.1                     # plant y[k+1] = a y[k] + b (u[k] + d[k])
    kp = 2.0
    q = 2e-2
    sigma = math.sqrt(q / (2 * ts))
    rng = np.random.default_rng(7)
    n = 400_000
    d = rng.standard_normal(n) * sigma
    y = np.zeros(n)
    for k in range(n - 1):
        y[k + 1] = a_ * y[k] + b_ * (-kp * y[k] + d[k])
    Gd = control.tf([b_], [1, -a_], ts)
    m = measure(Gd, kp, ["rms_error"], sample_time=ts,
                spectra=(Spectrum("input_disturbance", intensity=q),))
    assert_allclose(m["rms_error"] ** 2, np.var(y[1000:]), rtol=0.02)
    # and the closed form of the AR(1) process: b^2 sigma^2 / (1 - (a - b kp)^2)
    assert_allclose(m["rms_error"] ** 2, b_ ** 2 * sigma ** 2 / (1 - (a_ - b_ * kp) ** 2),
                    rtol=1e-12)


def test_family_worst_and_per_variant_batched():
    # Each variant's value equals the single-variant computation (first-order closed form
    # q/(2 a)); the family's worst is the largest.
    q, k = 0.5, 1.0
    vs = tuple(Variant(f"a{a}", "sample", control.tf([1], [1, a])) for a in (0.5, 1.0, 4.0))
    fam = PlantFamily(vs)
    m = measure(fam, k, ["rms_error"], spectra=(Spectrum("input_disturbance",
                                                         intensity=2 * q),))
    per = m.per_variant("rms_error") ** 2
    assert_allclose(per, [q / (2 * (a + k)) for a in (0.5, 1.0, 4.0)], rtol=1e-12)
    assert m.worst_variant("rms_error") == "a0.5"


def test_rms_curve_bands_add_up_to_the_total():
    # The cumulative curve reaches the exact total within its trapezoid error, and the band
    # shares add up to the total (they are rescaled to it by construction, checked here).
    G, K, W = _pid_loop()
    sp = Spectrum("sensor_noise", intensity=1e-6, shaping=W)
    c = rms_curve(G, K, LoopSpec(spectra=(sp,)))
    tot = c.total["sensor_noise"]
    assert_allclose(c.cumulative["sensor_noise"][-1], tot, rtol=1e-3)
    assert_allclose(sum(c.band_variance["sensor_noise"]), tot, rtol=1e-12)
    assert np.all(np.diff(c.cumulative["sensor_noise"]) >= 0)


def test_psd_table_parser_names_the_bad_row():
    f, p = parse_psd_table("# noise\nfrequency_Hz, psd\n1, 1e-6\n10, 2e-6\n100 4e-7\n")
    assert f == (1.0, 10.0, 100.0) and p == (1e-6, 2e-6, 4e-7)
    with pytest.raises(ModelError, match=r"row 4: .* does not increase"):
        parse_psd_table("f,psd\n1, 1\n2, 1\n2, 1\n")
    with pytest.raises(ModelError, match="row 3: negative psd"):
        parse_psd_table("f,psd\n1, 1\n2, -1\n")
    with pytest.raises(ModelError, match="row 2: 'x, 1' is not two numbers"):
        parse_psd_table("1, 1\nx, 1\n")
    with pytest.raises(ModelError, match="at least two rows"):
        parse_psd_table("1, 1\n")


def test_psd_loglog_interpolation_is_exact_for_a_power_law():
    # A power law is a straight line in log-log: interpolation reproduces it (definition).
    f = np.array([1.0, 10.0, 1000.0])
    sp = Spectrum("sensor_noise", frequencies=tuple(f), psd=tuple(f ** -2.0))
    x = np.array([2.0, 5.0, 50.0, 999.0])
    assert_allclose(psd_at(sp, x), x ** -2.0, rtol=1e-12)
    assert psd_at(sp, np.array([0.5, 2000.0])).tolist() == [0.0, 0.0]


def test_unstable_shaping_filter_and_missing_spectra_are_refused():
    G = control.tf([1], [1, 1])
    bad = Spectrum("sensor_noise", intensity=1.0, shaping=control.tf([1], [1, 0]))
    m = measure(G, 1.0, ["rms_error"], spectra=(bad,))
    assert "stability boundary" in m.errors["rms_error"]
    m = measure(G, 1.0, ["rms_error"])
    assert "no spectra" in m.errors["rms_error"]
    m = measure(G, 1.0, ["rms_error"], source="output_disturbance",
                spectra=(Spectrum("sensor_noise", intensity=1.0,
                                  shaping=control.tf([1], [1, 1])),))
    assert "no output_disturbance spectrum" in m.errors["rms_error"]


def test_digital_table_up_to_nyquist_equals_the_white_sequence():
    # A flat table of level q from 0 Hz to the Nyquist frequency is the white sequence of
    # variance q / (2 Ts) (definition of the digital convention); reference:
    # scipy.linalg.solve_discrete_lyapunov of the loop closed by python-control.
    ts = 1e-3
    Gd = control.tf([0.1], [1, -0.9], ts)
    q = 2e-2
    fn = 0.5 / ts
    tab = Spectrum("input_disturbance", frequencies=(0.0, fn / 2, fn), psd=(q, q, q))
    b = rms_budget(Gd, 2.0, LoopSpec(sample_time=ts, spectra=(tab,)))
    s = control.ss(control.feedback(Gd, 2.0))
    P = solve_discrete_lyapunov(s.A, s.B @ s.B.T)
    ref = q / (2 * ts) * float((s.C @ P @ s.C.T + s.D @ s.D.T)[0, 0])
    assert_allclose(b.variance[0], ref, rtol=1e-8)
