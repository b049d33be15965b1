"""The continuous output of a sampled-data loop and ``intersample_ripple`` (issue 14, item 4).

References: scipy.integrate.solve_ivp (RK45 at rtol 1e-11) of the hybrid loop written out
here by hand (the plant integrated over each sample interval under the held controller
output, the controller's difference equation run at the sample instants); the engine's own
discrete closed loop at the sample instants (the exact ZOH equivalent, python-control
``sample_system`` in test_digital.py) for the sampled values.
"""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
from scipy.integrate import solve_ivp

from ledger.engine import measure
from ledger.engine.intersample import SUBSTEPS, continuous_step
from ledger.engine.loop import LoopSpec
from ledger.errors import ComputeError
from ledger.systems import build_family, parse_model

T = 0.01
W = 2 * math.pi / T            # a plant mode at the sampling frequency: the samples hide it
RESONANT = f"{W**2!r}/(s^2+2*0.0002*{W!r}*s+{W**2!r})*5/(s+5)"
KI = 0.4
CTL = f"diffeq([{KI}], [-1])"  # u[k] = u[k-1] + KI e[k]


def _hybrid_reference(plant_text, n_samples, delay_samples=0):
    """solve_ivp of the plant over each interval under the held input; the integrating
    controller at the samples; returns (t fine, y fine)."""
    G = control.ss(parse_model(plant_text).system)
    A, B, C = np.asarray(G.A), np.asarray(G.B).reshape(-1), np.asarray(G.C).reshape(-1)
    x = np.zeros(A.shape[0])
    u_hist = [0.0] * (delay_samples + 1)
    u = 0.0
    ts, ys = [], []
    for k in range(n_samples):
        y_k = C @ x
        u = u + KI * (1.0 - y_k)
        u_hist.append(u)
        v = u_hist[-1 - delay_samples]
        t_eval = k * T + np.arange(SUBSTEPS) * (T / SUBSTEPS)
        sol = solve_ivp(lambda t, z: A @ z + B * v, (k * T, (k + 1) * T), x, t_eval=t_eval,
                        rtol=1e-11, atol=1e-13, method="RK45")
        ts.append(sol.t)
        ys.append(C @ sol.y)
        end = solve_ivp(lambda t, z: A @ z + B * v, (k * T, (k + 1) * T), x, rtol=1e-11,
                        atol=1e-13, method="RK45")
        x = end.y[:, -1]
    return np.concatenate(ts), np.concatenate(ys)


@pytest.mark.parametrize("delay", [0, 1])
def test_continuous_output_matches_a_fine_simulation_of_the_hybrid_loop(delay):
    fam = build_family(RESONANT, {})
    K = parse_model(CTL, sample_time=T).system
    st = continuous_step(fam, K, LoopSpec(sample_time=T, computation_delay=delay))[0]
    n = 40
    t_ref, y_ref = _hybrid_reference(RESONANT, n, delay)
    np.testing.assert_allclose(st.t[:n * SUBSTEPS], t_ref, rtol=0, atol=1e-12)
    scale = np.max(np.abs(y_ref))
    np.testing.assert_allclose(st.y[:n * SUBSTEPS], y_ref, rtol=0, atol=1e-7 * scale)


def test_sample_values_equal_the_discrete_closed_loop():
    # at t = k T the continuous output is the discrete loop's output (exact ZOH equivalent)
    from ledger.engine.loop import assemble
    from ledger.engine.timeresp import step_response

    fam = build_family("40/(s*(0.05*s+1))", {})
    K = parse_model("diffeq([0.3, -0.29], [-0.95])", sample_time=T).system
    loop = LoopSpec(sample_time=T, computation_delay=1.4)   # fractional latency too
    st = continuous_step(fam, K, loop)[0]
    g = assemble(fam, K, loop).groups[0]
    y = step_response(g.paths["r->y"]).y[0]
    k = min(y.size, st.y_samples.size)
    np.testing.assert_allclose(st.y_samples[:k], y[:k], rtol=0, atol=1e-10)


def test_ripple_the_sample_instants_hide():
    m = measure(RESONANT, CTL, ["intersample_ripple", "settling_time"], sample_time=T,
                settling_band=0.001)
    st = continuous_step(build_family(RESONANT, {}), parse_model(CTL, sample_time=T).system,
                         LoopSpec(sample_time=T))[0]
    # after settling the samples move by little from one to the next, while the output
    # between them swings (the mode at the sampling frequency is invisible at t = k T)
    ts = m["settling_time"]
    ys = st.y_samples[st.t_samples >= ts]
    seen_at_samples = 100 * np.max(np.abs(np.diff(ys))) / st.final
    assert m["intersample_ripple"] > 0.3          # % of the final value
    assert seen_at_samples < m["intersample_ripple"] / 10
    # without the resonance the same loop has next to no ripple
    calm = measure("5/(s+5)", CTL, ["intersample_ripple"], sample_time=T)
    assert calm["intersample_ripple"] < m["intersample_ripple"] / 20


def test_ripple_needs_a_digital_loop():
    with pytest.raises(ComputeError, match="digital"):
        measure("5/(s+5)", "pi(1, 3)", ["intersample_ripple"])["intersample_ripple"]


def test_time_basis_continuous_against_the_hybrid_simulation():
    # Overshoot and settling read on the solve_ivp reference of the hybrid loop (same fine
    # grid, crossings by linear interpolation) against time_basis="continuous"
    plant = "5/(s+5)"
    ctl = CTL
    Ts = T
    m = measure(plant, ctl, ["overshoot", "settling_time", "rise_time"], sample_time=Ts,
                time_basis="continuous")
    t, y = _hybrid_reference(plant, 300)
    final = 1.0                                  # integral action, unit DC plant gain
    over = 100 * (np.max(y) - final)
    assert m["overshoot"] == pytest.approx(over, rel=1e-6)
    out = np.flatnonzero(np.abs(y - final) > 0.02)
    i = out[-1]
    d0, d1 = abs(y[i] - final) - 0.02, abs(y[i + 1] - final) - 0.02
    assert m["settling_time"] == pytest.approx(t[i] + (t[i + 1] - t[i]) * d0 / (d0 - d1),
                                               rel=1e-6)
    # the default stays on the samples, and its settings are what they were
    from ledger.engine.metrics import resolve_settings

    assert "time_basis" not in resolve_settings("overshoot")
    d = measure(plant, ctl, ["overshoot"], sample_time=Ts)
    assert d["overshoot"] == measure(plant, ctl, ["overshoot"], sample_time=Ts,
                                     time_basis="samples")["overshoot"]
    with pytest.raises(Exception, match="time_basis"):
        resolve_settings("overshoot", {"time_basis": "between"})
