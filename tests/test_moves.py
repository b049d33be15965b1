"""Large-move response through the actuator limit, rate limit and anti-windup (issue 16 item 2).

Sources at each test:
* first-order plant under P control: the closed-form piecewise solution (saturated phase
  y = (b U / a)(1 - e^{-a t}), then the linear first-order response; derived here);
* double integrator under filtered PD (lead) control: saturated phase y = b U t^2 / 2 with the
  controller state in closed form, then the linear phase by the matrix exponential of the
  closed-loop ODE written out by hand here;
* anti-windup schemes: scipy.integrate.solve_ivp (Radau, rtol 1e-12) with terminal events at
  every switching condition, restarted phase by phase;
* digital loops: a direct numpy loop over the samples, with the plant's ZOH discretisation from
  the matrix exponential of [[A, B], [0, 0]] Ts (Franklin, Powell and Workman, "Digital Control
  of Dynamic Systems", sec. 4.3.3; from memory).
"""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
import scipy.integrate
import scipy.linalg
import scipy.optimize
from numpy.testing import assert_allclose

from ledger.engine import measure
from ledger.engine.blocks import make_block
from ledger.engine.loop import LoopSpec
from ledger.engine.movemetrics import move_metrics
from ledger.engine.moves import simulate_move
from ledger.errors import ComputeError, LedgerError

s = control.tf("s")
ONE = make_block(1.0, "unity")
MOVE = ["move_settling_time", "move_overshoot", "move_time_saturated", "move_peak_rate"]


def _blocks(G, C, F=None):
    return (ONE if F is None else make_block(F, "f"), make_block(C, "c"), make_block(G, "g"),
            ONE)


@pytest.mark.parametrize("a, b, kp, U, R", [(2.0, 3.0, 5.0, 4.0, 2.0),
                                            (0.5, 1.0, 20.0, 1.5, -0.8),
                                            (10.0, 40.0, 2.0, 3.0, 5.0)])
def test_first_order_p_closed_form(a, b, kp, U, R):
    # saturated while kp |R - y| > U: y = sgn b U / a (1 - e^{-a t}); it leaves the limit at
    # y1 = R - sgn U / kp, then y -> yf = b kp R / (a + b kp) at the rate a + b kp
    F, K, G, H = _blocks(b / (s + a), control.tf([kp], [1]))
    loop = LoopSpec(actuator_limit=U)
    sg = math.copysign(1.0, R)
    assert kp * abs(R) > U and b * U / a > abs(R - sg * U / kp)  # premise: it saturates
    y1 = R - sg * U / kp
    t1 = -math.log(1 - y1 * a / (sg * b * U)) / a
    yf = b * kp * R / (a + b * kp)
    lam = a + b * kp
    settle = t1 + math.log(abs(y1 - yf) / (0.02 * abs(yf))) / lam
    resp = simulate_move(F, K, G, H, loop, R)
    assert len(resp.saturated) == 1
    assert_allclose(resp.saturated[0], (0.0, t1), rtol=1e-10, atol=1e-14)
    assert_allclose(resp.final, yf, rtol=1e-12)
    tt = np.linspace(0, 3 * settle, 37)
    y_ref = np.where(tt <= t1, sg * b * U / a * (1 - np.exp(-a * tt)),
                     yf + (y1 - yf) * np.exp(-lam * (tt - t1)))
    assert_allclose(resp.at(tt), y_ref, rtol=1e-9, atol=1e-12 * abs(R))
    st, ov, tsat, rate = move_metrics(F, K, G, H, loop, R)
    assert_allclose(st, settle, rtol=1e-9)
    assert ov == 0.0
    assert_allclose(tsat, t1, rtol=1e-10)
    assert_allclose(rate, b * U, rtol=1e-12)  # y' = b U - a y is largest at t = 0+
    # and the same through measure (the family driver)
    m = measure(b / (s + a), kp, MOVE, actuator_limit=U, move=R)
    assert_allclose(m["move_settling_time"], settle, rtol=1e-9)
    assert_allclose(m["move_time_saturated"], t1, rtol=1e-10)


def test_without_a_limit_the_move_is_the_linear_step():
    # no actuator limit: the move metrics are the linear step metrics times the amplitude
    # (linearity; the linear ones from ledger's exact step metrics, tested elsewhere)
    G, C = 4 / (s * (s + 2)), 3 * (s + 1) / (0.1 * s + 1)
    m = measure(G, C, MOVE + ["settling_time", "overshoot"], move=7.0)
    assert_allclose(m["move_settling_time"], m["settling_time"], rtol=1e-8)
    assert_allclose(m["move_overshoot"], m["overshoot"], rtol=1e-8)
    assert m["move_time_saturated"] == 0.0


def test_double_integrator_lead_pd_closed_form():
    # G = b/s^2, C = K (s + z)/(s + p) = K [1 + (z - p)/(s + p)].  Saturated phase (v = U):
    # y = c t^2 with c = b U / 2, controller state xc' = -p xc + e, e = R - c t^2:
    # xc = R (1 - e^{-pt})/p - c [t^2/p - 2t/p^2 + 2 (1 - e^{-pt})/p^3]  (integrated by hand)
    b, U, R, K, z, p = 1.0, 1.0, 0.6, 8.0, 1.0, 10.0
    c = b * U / 2

    def xc(t):
        return (R * (1 - math.exp(-p * t)) / p
                - c * (t * t / p - 2 * t / p ** 2 + 2 * (1 - math.exp(-p * t)) / p ** 3))

    def uc(t):
        return K * (R - c * t * t) + K * (z - p) * xc(t)

    t1 = scipy.optimize.brentq(lambda t: uc(t) - U, 1e-9, 10.0, xtol=1e-15, rtol=1e-15)
    # linear phase from [y, y', xc] at t1: y'' = b K (e + (z - p) xc), xc' = -p xc + e
    A = np.array([[0, 1, 0, 0], [-b * K, 0, b * K * (z - p), b * K * R],
                  [-1, 0, -p, R], [0, 0, 0, 0]], float)
    X1 = np.array([c * t1 ** 2, b * U * t1, xc(t1), 1.0])
    # premise: the command stays inside the limit afterwards (checked on a dense grid)
    tt = np.linspace(0, 20, 4001)
    X = np.array([scipy.linalg.expm(A * t) @ X1 for t in tt])
    u_lin = K * (R - X[:, 0]) + K * (z - p) * X[:, 2]
    assert np.max(np.abs(u_lin)) <= U
    F, Kb, G, H = _blocks(b / s ** 2, K * (s + z) / (s + p))
    resp = simulate_move(F, Kb, G, H, LoopSpec(actuator_limit=U), R)
    assert len(resp.saturated) == 1
    assert_allclose(resp.saturated[0][1], t1, rtol=1e-10)
    tq = np.concatenate([np.linspace(0, t1, 7), t1 + tt[::400]])
    y_ref = np.array([c * t * t if t <= t1 else
                      (scipy.linalg.expm(A * (t - t1)) @ X1)[0] for t in tq])
    assert_allclose(resp.at(tq), y_ref, rtol=1e-9, atol=1e-12)
    assert_allclose(resp.final, R, rtol=1e-12)  # type-2 loop: no step error
    # overshoot of the reference: the largest y on the dense grid, refined by Brent on y'
    k = int(np.argmax(X[:, 0]))
    tm = scipy.optimize.brentq(lambda t: (scipy.linalg.expm(A * t) @ X1)[1], tt[k - 1],
                               tt[k + 1], xtol=1e-15)
    ymax = (scipy.linalg.expm(A * tm) @ X1)[0]
    st, ov, tsat, rate = move_metrics(F, Kb, G, H, LoopSpec(actuator_limit=U), R)
    assert_allclose(ov, 100 * (ymax - R) / R, rtol=1e-8)
    assert_allclose(tsat, t1, rtol=1e-10)


# --------------------------------------------------------------------------- anti-windup
def _hybrid(phases, first, y0, t_end):
    """Integrate a hybrid automaton phase by phase: ``phases[name] = (rhs, [(event, direction,
    next name), ...])``; each event is terminal and names the phase entered."""
    t, x, name = 0.0, np.asarray(y0, float), first
    out = []
    while t < t_end:
        rhs, exits = phases[name]
        evs = []
        for fn, direction, _ in exits:
            ev = (lambda f: (lambda t, x: f(t, x)))(fn)
            ev.terminal, ev.direction = True, direction
            evs.append(ev)
        sol = scipy.integrate.solve_ivp(rhs, (t, t_end), x, method="Radau", rtol=1e-12,
                                        atol=1e-14, events=evs or None, dense_output=True)
        out.append((t, sol.t[-1], name, sol.sol))
        t, x = sol.t[-1], sol.y[:, -1]
        if sol.status != 1:
            break
        hit = [k for k, te in enumerate(sol.t_events) if te.size]
        name = exits[hit[0]][2]
    return out


def _ref_at(ref, tt):
    """The reference output at times ``tt`` (the phase holding each time)."""
    out = []
    for t in tt:
        sol = next(sl for t0, t1, _, sl in ref if t0 <= t <= t1)
        out.append(sol(t)[0])
    return np.array(out)


def _max_ref(ref):
    """The largest reference output: the grid maximum refined by bounded Brent on the dense
    interpolant."""
    best = -math.inf
    for t0, t1, _, sol in ref:
        tt = np.linspace(t0, t1, 2001)
        yy = sol(tt)[0]
        k = int(np.argmax(yy))
        lo, hi = tt[max(k - 1, 0)], tt[min(k + 1, tt.size - 1)]
        r = scipy.optimize.minimize_scalar(lambda t: -sol(t)[0], bounds=(lo, hi),
                                           method="bounded", options={"xatol": 1e-13})
        best = max(best, yy[k], -r.fun)
    return best


def _settle_ref(pieces, yf, band=0.02):
    """Last time |y - yf| > band |yf| on the dense outputs (grid of 2000 per phase, then
    Brent on the dense interpolant)."""
    last = None
    for t0, t1, _, sol in pieces:
        tt = np.linspace(t0, t1, 2001)
        out = np.abs(sol(tt)[0] - yf) > band * abs(yf)
        if out.any():
            k = int(np.flatnonzero(out)[-1])
            if k < tt.size - 1:
                lvl = yf + math.copysign(band * abs(yf), sol(tt[k])[0] - yf)
                last = scipy.optimize.brentq(lambda t: sol(t)[0] - lvl, tt[k], tt[k + 1],
                                             xtol=1e-14)
    return last


A_, B_, KP, KI, U, R = 1.0, 2.0, 3.0, 6.0, 1.0, 1.0


def _pi_blocks():
    return _blocks(B_ / (s + A_), KP + KI / s)


def test_anti_windup_none_against_solve_ivp():
    # y' = -a y + b sat(uc), xi' = ki e, uc = kp e + xi; switching at uc = +-U
    def uc(t, x):
        return KP * (R - x[0]) + x[1]
    phases = {
        "hi": (lambda t, x: [-A_ * x[0] + B_ * U, KI * (R - x[0])],
               [(lambda t, x: uc(t, x) - U, -1, "lin")]),
        "lin": (lambda t, x: [-A_ * x[0] + B_ * uc(t, x), KI * (R - x[0])],
                [(lambda t, x: uc(t, x) - U, 1, "hi"), (lambda t, x: uc(t, x) + U, -1, "lo")]),
        "lo": (lambda t, x: [-A_ * x[0] - B_ * U, KI * (R - x[0])],
               [(lambda t, x: uc(t, x) + U, 1, "lin")]),
    }
    ref = _hybrid(phases, "hi", [0.0, 0.0], 30.0)
    sat = sum(t1 - t0 for t0, t1, name, _ in ref if name != "lin")
    F, K, G, H = _pi_blocks()
    loop = LoopSpec(actuator_limit=U)
    st, ov, tsat, rate = move_metrics(F, K, G, H, loop, R)
    assert_allclose(tsat, sat, rtol=1e-8)
    assert_allclose(st, _settle_ref(ref, R), rtol=1e-7)
    assert_allclose(ov, 100 * (_max_ref(ref) - R) / R, rtol=1e-7)


def test_anti_windup_back_calculation_against_solve_ivp():
    kb = 4.0

    def uc(t, x):
        return KP * (R - x[0]) + x[1]
    phases = {
        "hi": (lambda t, x: [-A_ * x[0] + B_ * U, KI * (R - x[0]) + kb * (U - uc(t, x))],
               [(lambda t, x: uc(t, x) - U, -1, "lin")]),
        "lin": (lambda t, x: [-A_ * x[0] + B_ * uc(t, x), KI * (R - x[0])],
                [(lambda t, x: uc(t, x) - U, 1, "hi"), (lambda t, x: uc(t, x) + U, -1, "lo")]),
        "lo": (lambda t, x: [-A_ * x[0] - B_ * U, KI * (R - x[0]) + kb * (-U - uc(t, x))],
               [(lambda t, x: uc(t, x) + U, 1, "lin")]),
    }
    ref = _hybrid(phases, "hi", [0.0, 0.0], 30.0)
    sat = sum(t1 - t0 for t0, t1, name, _ in ref if name != "lin")
    F, K, G, H = _pi_blocks()
    loop = LoopSpec(actuator_limit=U, anti_windup="back-calculation", anti_windup_gain=kb)
    st, ov, tsat, rate = move_metrics(F, K, G, H, loop, R)
    assert_allclose(tsat, sat, rtol=1e-8)
    assert_allclose(st, _settle_ref(ref, R), rtol=1e-7)
    none = move_metrics(F, K, G, H, LoopSpec(actuator_limit=U), R)
    assert ov < none[1]  # back-calculation removes windup overshoot (common practice)


@pytest.mark.parametrize("KI, phases_expected", [(20.0, ["stopped", "holding", "lin"]),
                                                  (6.0, ["stopped", "lin"])])
def test_anti_windup_clamping_against_solve_ivp(KI, phases_expected):
    # clamping: at first uc = kp e > U with the integrator stopped (xi = 0).  When kp e = U:
    # if ki e > kp y' there, integrating pushes the command out and stopping pulls it in, so
    # the integrator holds uc at U (sliding: xi = U - kp e, rate kp y' between 0 and ki e)
    # until kp y' = ki e; otherwise the loop turns linear at once (derived from the definition
    # in docs/metrics.md)
    def uc(t, x):
        return KP * (R - x[0]) + x[1]
    phases = {
        "stopped": (lambda t, x: [-A_ * x[0] + B_ * U, 0.0],
                    [(lambda t, x: uc(t, x) - U, -1,
                      "holding" if phases_expected[1] == "holding" else "lin")]),
        "holding": (lambda t, x: [-A_ * x[0] + B_ * U, KP * (-A_ * x[0] + B_ * U)],
                    [(lambda t, x: KP * (-A_ * x[0] + B_ * U) - KI * (R - x[0]), 1, "lin")]),
        "lin": (lambda t, x: [-A_ * x[0] + B_ * uc(t, x), KI * (R - x[0])],
                [(lambda t, x: uc(t, x) - U, 1, "hi"), (lambda t, x: uc(t, x) + U, -1, "lo")]),
    }
    ref = _hybrid(phases, "stopped", [0.0, 0.0], 30.0)
    names = [name for *_, name, _ in ref]
    assert names == phases_expected  # premise of this case
    if KI == 20.0:  # at the switch: ki e = 20/3 > kp y' = 4 (sliding), else 2 < 4
        assert KI / KP * U > KP * (-A_ * (R - U / KP) + B_ * U)
    sat = sum(t1 - t0 for t0, t1, name, _ in ref if name != "lin")
    F, K, G, H = _blocks(B_ / (s + A_), KP + KI / s)
    resp = simulate_move(F, K, G, H, LoopSpec(actuator_limit=U, anti_windup="clamping"), R)
    names_engine = [resp.modes[k].name for k in resp.mode]
    assert ("upper limit, integrator holding" in names_engine) == ("holding" in names)
    st, ov, tsat, rate = move_metrics(F, K, G, H,
                                      LoopSpec(actuator_limit=U, anti_windup="clamping"), R)
    assert_allclose(tsat, sat, rtol=1e-8)
    assert_allclose(st, _settle_ref(ref, R), rtol=1e-7)
    tt = np.linspace(0, 10, 41)
    assert_allclose(resp.at(tt), _ref_at(ref, tt), rtol=1e-8, atol=1e-10)


def test_clamping_with_i_control_stops_and_restarts():
    # I control, uc = xi: clamped at U, xi stays U (no sliding) until e changes sign
    # (y = b U / a (1 - e^{-a t}) crosses R), then the linear loop: the saturated time is
    # -ln(1 - a R / (b U)) / a (closed form)
    a, b, ki, U_, R_ = 1.0, 3.0, 5.0, 1.0, 2.8
    F, K, G, H = _blocks(b / (s + a), ki / s)
    resp = simulate_move(F, K, G, H, LoopSpec(actuator_limit=U_, anti_windup="clamping"), R_)
    # uc = xi reaches U at t0 while y is still below R; the closed form of the first phase:
    # xi = ki (R t - y-integral) with y = 0 for the linear part, found by Brent
    def y_lin(t):  # linear phase from rest: y'' + a y' + b ki y = b ki R
        Acl = np.array([[0, 1, 0], [-b * ki, -a, b * ki * R_], [0, 0, 0]])
        return scipy.linalg.expm(Acl * t) @ np.array([0, 0, 1.0])
    # u = xi = ki * integral of e; with y and y' from the linear phase: xi = (y' + a y) / b
    def over(t):
        return (y_lin(t)[1] + a * y_lin(t)[0]) / b - U_
    grid = np.linspace(0, 2, 2001)
    k = int(np.flatnonzero(np.array([over(t) for t in grid]) > 0)[0])  # first crossing
    t0 = scipy.optimize.brentq(over, grid[k - 1], grid[k], xtol=1e-15)
    y0 = y_lin(t0)[0]
    # saturated: y' = -a y + b U from y0 until y = R
    t1 = t0 + math.log((b * U_ / a - y0) / (b * U_ / a - R_)) / a
    assert len(resp.saturated) == 1
    assert_allclose(resp.saturated[0], (t0, t1), rtol=1e-9)


# --------------------------------------------------------------------------- digital loops
def _zoh(A, B, ts):
    n = A.shape[0]
    M = np.zeros((n + 1, n + 1))
    M[:n, :n], M[:n, n] = A, B
    E = scipy.linalg.expm(M * ts)
    return E[:n, :n], E[:n, n]


@pytest.mark.parametrize("scheme, kb", [("none", None), ("clamping", None),
                                        ("back-calculation", 30.0)])
@pytest.mark.parametrize("rate", [None, 40.0])
def test_digital_saturated_loop_against_numpy(scheme, kb, rate):
    # plant 20/(s (s + 4)) (servo), PI in forward-Euler form C(z) = kp + ki Ts / (z - 1)
    ts, kp, ki, U_, R_ = 0.002, 2.0, 1.5, 1.0, 1.0
    A = np.array([[0.0, 1.0], [0.0, -4.0]])
    B = np.array([0.0, 20.0])
    Ad, Bd = _zoh(A, B, ts)
    N = 6000
    x, xi, v = np.zeros(2), 0.0, 0.0
    y = np.zeros(N)
    sat = np.zeros(N, bool)
    for k in range(N):
        y[k] = x[0]
        e = R_ - y[k]
        uc = kp * e + xi
        cmd = min(max(uc, -U_), U_)
        v = v + min(max(cmd - v, -rate * ts), rate * ts) if rate else cmd
        sat[k] = v != uc
        if scheme == "clamping" and sat[k] and ki * ts * e * (uc - v) > 0:
            pass
        elif scheme == "back-calculation":
            xi += ki * ts * e + kb * ts * (v - uc)
        else:
            xi += ki * ts * e
        x = Ad @ x + Bd * v
    assert sat[0] and not sat[-200:].any()  # premise: saturated, then settled
    C = control.tf([kp, ki * ts - kp], [1, -1], ts)
    m = measure(20 / (s * (s + 4)), C, MOVE, sample_time=ts, actuator_limit=U_, move=R_,
                rate_limit=rate, anti_windup=scheme, anti_windup_gain=kb)
    out = np.abs(y - R_) > 0.02 * R_
    settle = (np.flatnonzero(out)[-1] + 1) * ts
    assert_allclose(m["move_settling_time"], settle, rtol=1e-12)
    assert_allclose(m["move_overshoot"], max(0.0, 100 * (y.max() - R_) / R_), rtol=1e-8,
                    atol=1e-9)
    assert_allclose(m["move_time_saturated"], sat.sum() * ts, rtol=1e-12)
    assert_allclose(m["move_peak_rate"], np.max(np.abs(np.diff(y))) / ts, rtol=1e-9)


# --------------------------------------------------------------------------- refusals
def test_move_needs_a_delay_free_continuous_loop():
    m = measure(1 / (s + 1), 2.0, ["move_settling_time"], actuator_limit=1.0, move=1.0,
                delay=0.01)
    with pytest.raises(LedgerError, match="without delays"):
        m["move_settling_time"]


def test_move_setting_is_required_and_checked():
    with pytest.raises(LedgerError, match="needs the setting 'move'"):
        measure(1 / (s + 1), 2.0, ["move_settling_time"], actuator_limit=1.0)
    with pytest.raises(LedgerError, match="non-zero"):
        measure(1 / (s + 1), 2.0, ["move_settling_time"], actuator_limit=1.0, move=0.0)


def test_rate_limited_continuous_first_order():
    # rate limit only (no magnitude limit), P control on b/(s+a).  The actuator slews up at
    # Rt from 0 while the command kp e is ahead: v = Rt t, y = b Rt (t/a - (1 - e^{-a t})/a^2),
    # until kp (R - y) = Rt t (t1).  There the command falls faster than Rt, so the actuator
    # slews down: v = v1 - Rt tau, y = y1 e^{-a tau} + b [v1 (1 - e^{-a tau})/a
    # - Rt (tau/a - (1 - e^{-a tau})/a^2)], until the command meets it again (t2); then the
    # linear loop (closed forms derived here, switching instants by Brent)
    a, b, kp, Rt, R_ = 2.0, 2.0, 4.0, 10.0, 1.0

    def y_up(t):
        return b * Rt * (t / a - (1 - math.exp(-a * t)) / a ** 2)
    t1 = scipy.optimize.brentq(lambda t: kp * (R_ - y_up(t)) - Rt * t, 1e-12, 10, xtol=1e-15)
    v1, y1 = Rt * t1, y_up(t1)
    assert kp * (a * y1 - b * v1) < -Rt  # premise: the command falls faster than Rt at t1

    def y_down(tau):
        ea = math.exp(-a * tau)
        return y1 * ea + b * (v1 * (1 - ea) / a - Rt * (tau / a - (1 - ea) / a ** 2))
    tau2 = scipy.optimize.brentq(lambda tau: kp * (R_ - y_down(tau)) - (v1 - Rt * tau),
                                 1e-12, 1.0, xtol=1e-15)
    F, K, G, H = _blocks(b / (s + a), control.tf([kp], [1]))
    resp = simulate_move(F, K, G, H, LoopSpec(rate_limit=Rt), R_)
    names = [resp.modes[k].name for k in resp.mode]
    starts = [t for j, t in enumerate(resp.t) if j == 0 or names[j] != names[j - 1]]
    assert [n for j, n in enumerate(names) if j == 0 or n != names[j - 1]] == \
        ["slewing up", "slewing down", "linear"]
    assert_allclose(starts, [0.0, t1, t1 + tau2], rtol=1e-10, atol=1e-14)
    assert_allclose(resp.saturated[0], (0.0, t1 + tau2), rtol=1e-10, atol=1e-14)
    assert_allclose(resp.at([0.5 * t1, t1, t1 + 0.5 * tau2]),
                    [y_up(0.5 * t1), y1, y_down(0.5 * tau2)], rtol=1e-10)


def test_clamping_with_rate_limit_continuous_is_refused():
    m = measure(1 / (s + 1), 2 + 1 / s, ["move_overshoot"], rate_limit=1.0, move=1.0,
                anti_windup="clamping")
    with pytest.raises(ComputeError, match="digital"):
        m["move_overshoot"]
