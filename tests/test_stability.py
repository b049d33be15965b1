"""Internal stability, Nyquist count for delayed loops, damping and decay rate."""

from __future__ import annotations

import control
import numpy as np
import pytest
from numpy.testing import assert_allclose

from ledger.engine.loop import LoopSpec, assemble
from ledger.engine.stability import decay_rate, min_damping, nyquist_unstable_count, stability
from ledger.engine.types import PlantFamily, Variant
from ledger.errors import ComputeError


def test_unstable_cancellation_is_not_internally_stable():
    # Source: textbook internal-stability example (from memory: Doyle, Francis and Tannenbaum,
    # Feedback Control Theory, ch. 3): C = (s-1)/(s+1), G = 1/(s-1) gives T = 1/(s+2), which
    # looks stable, but PS = (s+1)/((s-1)(s+2)) has the pole s = 1.
    G = control.tf([1], [1, -1])
    C = control.tf([1, -1], [1, 1])
    T = control.minreal(control.feedback(C * G), verbose=False)
    assert np.all(T.poles().real < 0)  # T alone looks fine (reference library)
    rep = stability(assemble(PlantFamily.single(G), C))
    assert not rep.stable[0]
    assert rep.unstable_poles[0] == 1
    assert "closed right half plane" in rep.reasons[0]
    # the interconnection has exactly the poles 1 and -2 (closed form above)
    assert_allclose(np.sort(assemble(PlantFamily.single(G), C).groups[0].poles[0].real),
                    [-2.0, 1.0], rtol=1e-10)


def test_open_loop_unstable_plant_stabilised():
    # Source: closed form, 1 + K/(s-1) = 0 -> s = 1 - K; K = 2 gives s = -1 (stable),
    # K = 0.5 gives s = 0.5 (unstable).
    for K, ok, pole in ((2.0, True, -1.0), (0.5, False, 0.5)):
        asm = assemble(PlantFamily.single(control.tf([K], [1, -1])), 1.0)
        assert stability(asm).stable[0] == ok
        assert_allclose(asm.groups[0].poles[0].real, [pole], rtol=1e-12)


def _pade_unstable(G, C, tau, order=14):
    # independent reference: closed-loop poles with a high-order Pade approximant of the delay
    num, den = control.pade(tau, order)
    cl = control.feedback(C * G * control.tf(num, den))
    return int(np.sum(cl.poles().real > 0))


@pytest.mark.parametrize("G, C, delays", [
    (control.tf([1], [1, 0]), 1.0, [0.2, 1.2, 1.5, 1.7, 3.0]),          # limit pi/2
    (control.tf([2], [1, -1]), 1.0, [0.1, 0.5, 0.58, 0.63, 0.9]),       # limit 0.6046
    (control.tf([4], [1, 1.2, 1]), control.tf([1, 1], [0.1, 1]), [0.01, 0.1, 0.3, 0.8]),
    (control.tf([1], [1, 0.2, 1, 0]), 0.1, [0.0, 0.5, 4.0]),
    # open-loop poles on the imaginary axis (undamped mode, double integrator): the contour
    # passes them on small half circles
    (control.tf([1], [1, 0, 1]), control.tf([2, 1], [0.1, 1]), [0.02, 0.3, 0.6, 2.0]),
    (control.tf([1], [1, 0, 0]), control.tf([2, 1], [0.1, 1]), [0.02, 0.3, 0.6, 2.0]),
])
def test_delayed_loop_nyquist_matches_pade_reference(G, C, delays):
    # Source: reference library -- closed-loop poles of the loop with control.pade(tau, 14);
    # the boundary cases are near the closed-form delay margins (1/s: pi/2 s;
    # 2/(s-1): (pi/3)/sqrt(3) = 0.6046 s).
    fam = PlantFamily(tuple(Variant(f"d{i}", "corner", G, delay=d) for i, d in enumerate(delays)))
    rep = stability(assemble(fam, C))
    for i, d in enumerate(delays):
        if d == 0.0:
            ref = int(np.sum(control.feedback(C * G).poles().real > 0))
        else:
            ref = _pade_unstable(G, C, d)
        assert rep.unstable_poles[i] == ref, (d, rep.unstable_poles[i], ref)
        assert rep.stable[i] == (ref == 0)


def test_nyquist_agrees_with_frequency_kernel_when_present():
    # Source: two-method check -- our contour count against the frequency-kernel engineer's
    # closed_loop_unstable_count (skipped if that module is absent).
    fr = pytest.importorskip("ledger.engine.freqresp")
    if not hasattr(fr, "closed_loop_unstable_count"):
        pytest.skip("freqresp has no closed_loop_unstable_count")
    G = control.tf([2], [1, -1])
    fam = PlantFamily(tuple(Variant(f"d{i}", "corner", G, delay=d)
                            for i, d in enumerate([0.1, 0.5, 0.9])))
    g = assemble(fam, 1.0).groups[0]
    assert_allclose(nyquist_unstable_count(g), fr.closed_loop_unstable_count(g.loop_gain),
                    atol=0)


def test_digital_loop_stability_by_eigenvalues():
    # Source: closed form -- G = 1/s sampled with ZOH at Ts is Ts/(z-1); with gain K the
    # closed-loop pole is z = 1 - K Ts, stable iff 0 < K Ts < 2.
    ts = 0.1
    for K, ok in ((5.0, True), (19.0, True), (21.0, False)):
        asm = assemble(PlantFamily.single(control.tf([1], [1, 0])), control.tf(K, 1, ts),
                       LoopSpec(sample_time=ts))
        assert stability(asm).stable[0] == ok
        assert_allclose(asm.groups[0].poles[0], [1 - K * ts], rtol=1e-12)


def test_damping_and_decay_rate_closed_form():
    # Source: Ogata, Modern Control Engineering, 5th ed., sec. 5-3 (second-order system):
    # L = 1/(s(s+1)) unity loop -> s^2 + s + 1, wn = 1, zeta = 0.5, decay rate zeta wn = 0.5.
    p = assemble(PlantFamily.single(control.tf([1], [1, 1, 0])), 1.0).groups[0].poles[0]
    assert_allclose(min_damping(p), 0.5, rtol=1e-12)
    assert_allclose(decay_rate(p), 0.5, rtol=1e-12)
    # real poles have damping 1 (definition)
    assert_allclose(min_damping(np.array([-3.0, -0.2])), 1.0, rtol=0)
    assert_allclose(decay_rate(np.array([-3.0, -0.2])), 0.2, rtol=1e-12)
    # discrete: z = exp(s Ts) maps back exactly (definition of the z-plane pole)
    ts = 0.05
    s = np.array([-2.0 + 3.0j, -2.0 - 3.0j, -7.0])
    assert_allclose(min_damping(np.exp(s * ts), ts), 2.0 / np.sqrt(13.0), rtol=1e-12)
    assert_allclose(decay_rate(np.exp(s * ts), ts), 2.0, rtol=1e-12)


def test_row_forms_of_pole_metrics_closed_form():
    """Damping and decay rate of many pole sets at once.

    Source: poles -zeta wn +- j wn sqrt(1 - zeta^2) of s^2 + 2 zeta wn s + wn^2 have damping
    ratio zeta and decay rate zeta wn (textbook closed form); discrete poles z = exp(s Ts)."""
    from ledger.engine.stability import decay_rate_rows, min_damping_rows

    zeta = np.array([0.05, 0.3, 0.7, 0.95])
    wn = np.array([2.0, 10.0, 50.0, 400.0])
    wd = wn * np.sqrt(1 - zeta ** 2)
    s = np.stack([-zeta * wn + 1j * wd, -zeta * wn - 1j * wd, -3 * wn + 0j], axis=1)
    np.testing.assert_allclose(min_damping_rows(s), zeta, rtol=1e-12)
    np.testing.assert_allclose(decay_rate_rows(s), zeta * wn, rtol=1e-12)
    ts = 1e-3
    np.testing.assert_allclose(min_damping_rows(np.exp(s * ts), ts), zeta, rtol=1e-9)
    np.testing.assert_allclose(decay_rate_rows(np.exp(s * ts), ts), zeta * wn, rtol=1e-9)


def test_deadbeat_loop_pole_metrics_leak_no_warning():
    # Issue 10, item 7.  Closed form: 1 + 1/(z - 1) = 0 gives the single closed-loop pole z = 0
    # (deadbeat); it decays infinitely fast (s = ln z / Ts -> -inf), real, so damping 1.
    # numpy's complex log(0)/Ts gave -inf + nan j and a RuntimeWarning; warnings are errors here.
    import warnings

    from ledger.engine import measure
    from ledger.engine.stability import decay_rate_rows, min_damping_rows

    dt = 0.1
    G = control.tf([1.0], [1.0, -1.0], dt)
    fam = PlantFamily((Variant("nominal", "nominal", G),
                       Variant("slow", "corner", control.tf([0.5], [1.0, -1.0], dt))))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert_allclose(assemble(PlantFamily.single(G), 1.0, LoopSpec(sample_time=dt))
                        .groups[0].poles[0], [0.0], atol=1e-15)
        m = measure(G, 1.0, ["stable", "min_damping", "decay_rate"], sample_time=dt)
        assert m["stable"] == 1.0 and m["min_damping"] == 1.0 and m["decay_rate"] == np.inf
        # a family: the pole at 0.5 (closed form 1 + 0.5/(z - 1) = 0) sets the worst values,
        # decay -ln(0.5)/Ts
        mf = measure(fam, 1.0, ["min_damping", "decay_rate"], sample_time=dt)
        assert_allclose(mf["decay_rate"], -np.log(0.5) / dt, rtol=1e-12)
        assert mf["min_damping"] == 1.0
        # the scalar and row forms directly, with z = 0 next to ordinary poles
        assert min_damping(np.array([0.0, 0.5]), dt) == 1.0
        assert decay_rate(np.array([0.0, 0.0]), dt) == np.inf
        assert_allclose(decay_rate_rows(np.array([[0.0, 0.5j]]), dt), [-np.log(0.5) / dt],
                        rtol=1e-12)
        assert min_damping_rows(np.array([[0.0, 0.0]]), dt)[0] == 1.0


# -- decay rate of continuous loops with a delay (issue 10, item 7) --------------------------

@pytest.mark.parametrize("K, T, tau", [(2.0, 1.0, 0.2), (0.5, 1.0, 1.0), (1.0, 2.0, 0.05),
                                       (5.0, 0.5, 0.3), (20.0, 1.0, 0.5)])
def test_decay_rate_with_delay_first_order_lambert_w(K, T, tau):
    # Closed form: K/(T s + 1) with the loop delay tau under unity feedback has the
    # characteristic equation T s + 1 + K e^{-s tau} = 0.  With u = s + 1/T:
    # (u tau) e^{u tau} = -(K tau / T) e^{tau/T}, so s = W(-(K tau/T) e^{tau/T}) / tau - 1/T,
    # and the principal branch W0 gives the rightmost root (Shinozaki and Mori, "Robust
    # stability analysis of linear time-delay systems by Lambert W function", Automatica 42,
    # 2006).  Reference values: scipy.special.lambertw.  The last two cases are unstable
    # (negative decay rate), the first two have a complex W0.
    from scipy.special import lambertw

    from ledger.engine import measure

    s_ref = complex(lambertw(-(K * tau / T) * np.exp(tau / T), 0)) / tau - 1.0 / T
    m = measure(control.tf([K], [T, 1.0]), 1.0, ["decay_rate", "stable"], delay=tau)
    # a simple root polished by Newton on the exact equation: 1e-10 relative is far above the
    # rounding of either side
    assert_allclose(m["decay_rate"], -s_ref.real, rtol=1e-10)
    assert (m["stable"] == 1.0) == (s_ref.real < 0)


def _pade_rightmost(L, tau, order=20):
    """Rightmost closed-loop pole of L e^{-s tau} under unity feedback, the delay by
    python-control's Pade approximation of the given order (state space, numpy eigvals)."""
    num, den = control.pade(tau, order)
    cl = control.feedback(control.ss(L) * control.ss(control.tf(num, den)), 1)
    p = np.linalg.eigvals(cl.A)
    return p[np.argmax(p.real)]


_s = control.tf("s")


@pytest.mark.parametrize("G, C, tau", [
    (1 / _s / (_s / 5 + 1) * 100 / (_s ** 2 + 0.4 * _s + 100), 1.0, 0.3),   # resonant mode
    (1 / (_s * (_s + 1)), control.tf([2.0, 1.0], [0.1, 1.0]), 0.2),          # lead
    (4 * (_s + 1) ** 2 / (_s ** 3 * (_s / 20 + 1)), 1.0, 0.05),              # conditionally stable
    (1 / (_s - 1), 3.0, 0.2),                                                # open-loop unstable
])
def test_decay_rate_with_delay_against_pade(G, C, tau):
    # Reference: 20th-order Pade of the delay (python-control), closed-loop poles.  The [n/n]
    # Pade error of e^{-x} is about (n!)^2 / ((2n)! (2n+1)!) |x|^(2n+1) (from memory), below
    # 1e-30 for n = 20 and |x| <= 4, so at the rightmost roots here (|s| tau < 4) the
    # reference is exact to rounding
    from ledger.engine import measure

    ref = _pade_rightmost(G * C, tau)
    assert abs(ref) * tau < 4.0
    m = measure(G, C, ["decay_rate", "stable"], delay=tau)
    assert_allclose(m["decay_rate"], -ref.real, rtol=1e-8)
    assert m["stable"] == 1.0 and m["decay_rate"] > 0


def test_decay_rate_with_delay_keeps_a_hidden_unstable_mode():
    # C = (s-1)/(s+1) cancels the plant pole of 1/(s-1): s = 1 stays a root of the
    # interconnection for every delay (closed form: it is not controllable from the loop), so
    # the decay rate is -1 and the loop is not internally stable
    from ledger.engine import measure

    m = measure(control.tf([1.0], [1.0, -1.0]), control.tf([1.0, -1.0], [1.0, 1.0]),
                ["decay_rate", "stable"], delay=0.1)
    assert m["stable"] == 0.0
    assert_allclose(m["decay_rate"], -1.0, rtol=1e-10)


def test_delay_pole_metrics_restrictions_are_named():
    # a biproper loop with a delay is a neutral delay system (docs/metrics.md): decay_rate is
    # refused with the reason; min_damping is defined for delay-free or digital loops only
    from ledger.engine import measure

    m = measure(control.tf([1.0, 2.0], [1.0, 3.0]), 0.5, ["decay_rate", "min_damping"],
                delay=0.1)
    with pytest.raises(ComputeError, match="neutral delay system"):
        m["decay_rate"]
    m = measure(control.tf([1.0], [1.0, 1.0]), 1.0, ["min_damping"], delay=0.1)
    with pytest.raises(ComputeError, match="min_damping needs a delay-free or digital loop"):
        m["min_damping"]
