"""Large moves: the response to a reference step of stated amplitude through the loop's actuator
limit and rate limit, with the revision's anti-windup scheme (docs/metrics.md, large moves).

The loop (signals of :mod:`ledger.engine.loop`, no noise, no disturbance)::

    e  = F r - ym,   ym = H y,   y = G v
    uc = xi + C0 e                  the controller's command; C = ri / s + C0 (digital:
                                    ri / (z - 1) + C0), xi its integrator (absent without one)
    v  = the actuator: |v| <= actuator_limit, |dv/dt| <= rate_limit

Anti-windup acts on the integrator ``xi`` only:

* ``none``: ``xi' = ri e``;
* ``clamping`` (conditional integration): ``xi' = 0`` while the actuator is at its limit and
  ``ri e`` would drive the command further into it; where stopping integrates the command back
  out of the limit while integrating drives it in, the integrator rate is the one that holds
  the command at the limit (the sliding motion of the switched system, Filippov's convex
  combination; it is also what sample-by-sample clamping tends to as the sample time shrinks);
* ``back-calculation`` with gain ``kb`` (1/s): ``xi' = ri e + kb (v - uc)``
  (Astrom and Hagglund, "Advanced PID Control", ISA 2006, sec. 3.5).

Continuous loops are piecewise affine: each mode (linear, at the upper or lower limit, slewing
at the rate limit, integrator stopped or sliding) is ``Z' = M Z`` with ``Z = [x; 1]``.  Each
piece is propagated exactly with the matrix exponential on steps of a twenty-fourth of the
fastest mode's period (and of its time constant); a mode is left where one of its validity
conditions (linear in ``Z``) reaches zero, located by Brent's method on the exact expression
``c expm(M s) Z`` (a minimum of a condition between two steps is found first from its
derivative, so a brief excursion is not missed).  The mode entered is the first one whose
conditions hold going forward (value > 0, or 0 with a positive derivative under its own
dynamics).  Digital loops step sample by sample with the saturated (and rate-limited)
command held over the sample; metrics are read at the samples, as for linear digital loops.

Metrics (:mod:`ledger.engine.movemetrics`) on the simulated output ``y``: settling time and overshoot with the definitions of the
linear ones against the final value of the move, the time the actuator spends at a limit, and
the peak output rate ``sup |dy/dt|`` (digital: the largest ``|y[k+1] - y[k]| / Ts``).
Continuous loops with a loop delay are refused (the pieces would not be finite-dimensional).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.optimize
import scipy.signal

from ..errors import ComputeError, UnstableLoopError

__all__ = ["MoveSetup", "MoveResponse", "move_setup", "simulate_move"]


# --------------------------------------------------------------------------- set-up
def _split_integrator(K, dt):
    """``(ri, A0, B0, C0, D0)``: the controller as ``ri / s + C0(s)`` (digital:
    ``ri / (z - 1) + C0(z)``), ``ri = 0`` without a pole at the origin."""
    origin = 1.0 if dt else 0.0
    poles = np.asarray(K.poles, complex)
    zeros = np.asarray(K.zeros, complex)
    num = np.real(K.gain * np.poly(zeros)) if zeros.size else np.array([float(K.gain)])
    scale = max([1.0] + list(np.abs(poles)))
    at = np.flatnonzero(np.abs(poles - origin) < 1e-9 * scale)
    if at.size == 0:
        return 0.0, K.A, K.B, K.C, float(K.D)
    rest = np.delete(poles, at[0])
    den0 = np.real(np.poly(rest)) if rest.size else np.array([1.0])
    ri = float(np.polyval(num, origin) / np.polyval(den0, origin))
    q, rem = np.polydiv(np.polysub(num, ri * den0), np.array([1.0, -origin]))
    if q.size == 0:
        q = np.array([0.0])
    if rest.size == 0:
        return ri, np.zeros((0, 0)), np.zeros(0), np.zeros(0), float(q[-1])
    A0, B0, C0, D0 = scipy.signal.tf2ss(q, den0)
    return ri, A0, B0[:, 0], C0[0], float(D0[0, 0])


@dataclass(frozen=True, eq=False)
class MoveSetup:
    """The loop of one variant for a large move: block matrices and the actuator.

    ``blocks``: ``(F, (ri, A0, B0, C0, D0), G, H)`` with F, G, H as
    :class:`~ledger.engine.blocks.Block`; ``limit``, ``rate``: actuator limit (input units)
    and rate limit (input units per s), ``inf`` when absent; ``scheme``, ``kb``: anti-windup.
    """

    blocks: tuple
    dt: float | None
    limit: float
    rate: float
    scheme: str
    kb: float


def move_setup(F, K, G, H, loop) -> MoveSetup:
    """A :class:`MoveSetup` from blocks and a :class:`~ledger.engine.loop.LoopSpec`."""
    dt = loop.sample_time
    if abs(float(G.D)) > 0:
        raise ComputeError("large-move metrics need a strictly proper plant (no feedthrough "
                           "from the actuator to the output)")
    lim = math.inf if loop.actuator_limit is None else float(loop.actuator_limit)
    rate = math.inf if loop.rate_limit is None else float(loop.rate_limit)
    scheme = loop.anti_windup or "none"
    if dt is None and scheme == "clamping" and math.isfinite(rate):
        raise ComputeError("clamping anti-windup with a rate limit is simulated for digital "
                           "loops only; use back-calculation or a digital loop")
    return MoveSetup(blocks=(F, _split_integrator(K, dt), G, H), dt=dt, limit=lim, rate=rate,
                     scheme=scheme, kb=float(loop.anti_windup_gain or 0.0))


# --------------------------------------------------------------------------- continuous modes
class _Rows:
    """Index ranges of the state ``Z = [xf, xi, x0, xg, xh, v, 1]`` and the signal rows."""

    def __init__(self, st: MoveSetup, R: float):
        F, (ri, A0, B0, C0, D0), G, H = st.blocks
        self.st, self.R, self.ri = st, R, ri
        self.ni = 1 if ri != 0 else 0
        self.nv = 1 if math.isfinite(st.rate) else 0
        sizes = [F.order, self.ni, A0.shape[0], G.order, H.order, self.nv]
        off = np.concatenate([[0], np.cumsum(sizes)])
        self.f, self.i, self.c, self.g, self.h, self.v = (slice(off[k], off[k + 1])
                                                           for k in range(6))
        self.n = int(off[-1])
        self.m = self.n + 1
        m = self.m
        one = np.zeros(m)
        one[self.n] = 1.0
        self.one = one
        y = np.zeros(m)
        y[self.g] = G.C
        ym = H.D * y
        ym[self.h] += H.C
        rf = np.zeros(m)
        rf[self.f] = F.C
        rf[self.n] += F.D * R
        self.y, self.e = y, rf - ym
        uc = D0 * self.e
        uc[self.i] += 1.0
        uc[self.c] += C0
        self.uc = uc
        self.blocks = (F, (ri, A0, B0, C0, D0), G, H)

    def generator(self, v_row, xi_rate, v_rate=None):
        """Rows of ``Z'`` for the plant input ``v_row`` and the integrator rate ``xi_rate``
        (a row, or the string ``"slide"``); ``v_rate``: rate of the actuator state."""
        F, (ri, A0, B0, C0, D0), G, H = self.blocks
        M = np.zeros((self.m, self.m))
        M[self.f, self.f] = F.A
        M[self.f, self.n] = F.B * self.R
        M[self.c, :] = np.outer(B0, self.e)
        M[self.c, self.c] += A0
        M[self.g, :] = np.outer(G.B, v_row)
        M[self.g, self.g] += G.A
        M[self.h, :] = np.outer(H.B, self.y)
        M[self.h, self.h] += H.A
        if self.ni:
            if isinstance(xi_rate, str):  # hold uc' = 0 with the integrator
                M[self.i, :] = 0.0
                M[self.i, :] = -(self.uc @ M)
            else:
                M[self.i, :] = xi_rate
        if self.nv:
            M[self.v, :] = (self.uc @ M) if v_rate is None else v_rate
        return M


@dataclass(frozen=True, eq=False)
class _Mode:
    name: str
    M: np.ndarray
    conds: tuple          # rows c: the mode holds while c . Z >= 0
    saturated: bool
    eqs: tuple = ()       # rows c with c . Z = 0 on entry (the rate-limited actuator's state)


def _modes(rows: _Rows) -> list:
    st, U, Rt = rows.st, rows.st.limit, rows.st.rate
    one, uc, e, ri = rows.one, rows.uc, rows.e, rows.ri
    kb = st.kb if st.scheme == "back-calculation" else 0.0
    modes = []
    if rows.nv:
        vrow = np.zeros(rows.m)
        vrow[rows.v] = 1.0
    else:
        vrow = uc

    def xi_on(v_row):
        return ri * e + kb * (v_row - uc)

    # linear (tracking): |uc| <= U (and |uc'| <= rate)
    M = rows.generator(vrow, xi_on(vrow))
    conds = []
    if math.isfinite(U):
        conds += [U * one - uc, uc + U * one]
    if rows.nv:
        duc = uc @ M
        conds += [Rt * one - duc, duc + Rt * one]
    modes.append(_Mode("linear", M, tuple(conds), False,
                       (uc - vrow,) if rows.nv else ()))
    if not math.isfinite(U) and not rows.nv:
        return modes
    for sgn, side in ((1.0, "upper"), (-1.0, "lower")):
        if math.isfinite(U):
            held = sgn * U * one
            out = sgn * (uc - U * sgn * one)    # >= 0: the command is beyond the limit
            if rows.nv:
                vrate = np.zeros(rows.m)
                Mh = rows.generator(vrow, xi_on(vrow), v_rate=vrate)
                base = (out,)
            else:
                Mh = None
                base = (out,)
            v_hold = vrow if rows.nv else held
            if st.scheme == "clamping" and rows.ni:
                push = sgn * ri * e                  # >= 0: integrating drives further in
                M_on = rows.generator(v_hold, xi_on(v_hold))
                modes.append(_Mode(f"{side} limit", M_on, base + (-push,), True))
                M_fr = rows.generator(v_hold, np.zeros(rows.m))
                modes.append(_Mode(f"{side} limit, integrator stopped", M_fr,
                                   base + (push,), True))
                M_sl = rows.generator(v_hold, "slide")
                alpha = M_sl[rows.i.start]
                # sliding: the integrator rate alpha lies between 0 and ri e (sign-adjusted)
                modes.append(_Mode(f"{side} limit, integrator holding", M_sl,
                                   (sgn * alpha, push - sgn * alpha), True))
            else:
                M_on = Mh if Mh is not None else rows.generator(v_hold, xi_on(v_hold))
                modes.append(_Mode(f"{side} limit", M_on, base, True,
                                   (vrow - held,) if rows.nv else ()))
        if rows.nv:
            vr = sgn * Rt * one
            Ms = rows.generator(vrow, xi_on(vrow), v_rate=vr)
            vstate = vrow
            conds = [sgn * (uc - vstate)]          # the command is still ahead of the actuator
            if math.isfinite(U):
                conds.append(U * one - sgn * vstate)
            modes.append(_Mode(f"slewing {'up' if sgn > 0 else 'down'}", Ms, tuple(conds),
                               True))
    return modes


def _forward_ok(mode: _Mode, Z: np.ndarray) -> float:
    """How well ``Z`` satisfies ``mode`` going forward: the smallest condition value, with a
    condition at zero replaced by its derivative (then second derivative) under the mode; > 0
    when the mode holds, <= 0 when it does not."""
    for c in mode.eqs:
        if abs(float(c @ Z)) > 1e-10 * (float(np.abs(c) @ np.abs(Z)) + 1e-300):
            return -math.inf
    worst = math.inf
    MZ = mode.M @ Z
    MMZ = mode.M @ MZ
    for c in mode.conds:
        val = float(c @ Z)
        tol = 1e-10 * (float(np.abs(c) @ np.abs(Z)) + 1e-300)
        if val > tol:
            score = 1.0
        elif val < -tol:
            score = -1.0 - abs(val)
        else:
            d1 = float(c @ MZ)
            t1 = 1e-10 * (float(np.abs(c) @ np.abs(MZ)) + 1e-300)
            if d1 > t1:
                score = 0.5
            elif d1 < -t1:
                score = -0.5
            else:
                d2 = float(c @ MMZ)
                score = 0.25 if d2 >= 0 else -0.25
        worst = min(worst, score)
    return worst


def _choose(modes, Z, prefer: int | None = None) -> int:
    scores = [_forward_ok(md, Z) for md in modes]
    ok = [k for k, s in enumerate(scores) if s > 0]
    if ok:
        return ok[0]
    return int(np.argmax(scores))


def _step_size(modes) -> float:
    h = math.inf
    for md in modes:
        lam = np.linalg.eigvals(md.M[:-1, :-1]) if md.M.shape[0] > 1 else np.zeros(0)
        lam = lam[np.abs(lam) > 1e-12]
        if lam.size:
            h = min(h, 1.0 / (4.0 * float(np.max(np.abs(lam)))),
                    2 * math.pi / (24.0 * max(float(np.max(np.abs(lam.imag))), 1e-300)))
    return h if math.isfinite(h) else 1.0


def _slowest(M) -> float:
    lam = np.linalg.eigvals(M[:-1, :-1]) if M.shape[0] > 1 else np.zeros(0)
    if lam.size == 0:
        return 0.0
    return float(np.min(-lam.real))


@dataclass(frozen=True, eq=False)
class MoveResponse:
    """The simulated large move of one variant.

    ``t`` (N,) piece start times (s); ``Z`` (N, m) states there; ``mode`` (N,) index into
    ``modes`` per piece; ``h`` (N,) piece lengths; ``C`` the output row; ``final`` the final
    value; ``saturated`` a list of ``(start, end)`` intervals (s) with the actuator at a limit.
    Digital: ``t`` are the samples, ``y`` the sampled output.
    """

    t: np.ndarray
    y: np.ndarray
    final: float
    saturated: tuple
    dt: float | None
    Z: np.ndarray | None = None
    h: np.ndarray | None = None
    mode: np.ndarray | None = None
    modes: tuple = ()
    C: np.ndarray | None = None

    def at(self, tq) -> np.ndarray:
        """The output at times ``tq`` (s): exact (continuous) or held samples (digital)."""
        tq = np.atleast_1d(np.asarray(tq, float))
        if self.dt is not None:
            k = np.clip(np.floor(tq / self.dt + 1e-9).astype(int), 0, self.y.size - 1)
            return self.y[k]
        k = np.clip(np.searchsorted(self.t, tq, side="right") - 1, 0, self.t.size - 1)
        out = np.empty(tq.size)
        for j, (kk, tt) in enumerate(zip(k, tq)):
            M = self.modes[self.mode[kk]].M
            out[j] = self.C @ scipy.linalg.expm(M * (tt - self.t[kk])) @ self.Z[kk]
        return out


def _brent(f, a, b, fa, fb, span):
    if fa == 0:
        return a
    if fb == 0:
        return b
    return scipy.optimize.brentq(f, a, b, xtol=1e-15 * max(span, 1e-300), rtol=1e-15,
                                 maxiter=200)


def _first_exit(mode: _Mode, Z: np.ndarray, h: float):
    """Time ``s`` in ``(0, h]`` at which a condition of ``mode`` first reaches zero going
    negative from ``Z``, or ``None``."""
    E = scipy.linalg.expm(mode.M * h)
    Zb = E @ Z
    best = None
    for c in mode.conds:
        f0, f1 = float(c @ Z), float(c @ Zb)
        d0, d1 = float(c @ mode.M @ Z), float(c @ mode.M @ Zb)
        # rounding: a condition held at zero (e.g. a stopped integrator at the limit) is not
        # left until it goes clearly negative
        tol = 1e-12 * (float(np.abs(c) @ (np.abs(Z) + np.abs(Zb))) + 1e-300)

        def f(s, c=c):
            return float(c @ scipy.linalg.expm(mode.M * s) @ Z)
        hit = None
        if f1 < -tol:
            hit = _brent(f, 0.0, h, f0, f1, h) if f0 > 0 else 0.0
        elif d0 < 0 < d1:
            def df(s, c=c):
                return float(c @ mode.M @ scipy.linalg.expm(mode.M * s) @ Z)
            sm = _brent(df, 0.0, h, d0, d1, h)
            fm = f(sm)
            if fm < -tol:
                hit = _brent(f, 0.0, sm, f0, fm, h) if f0 > 0 else 0.0
        if hit is not None and (best is None or hit < best):
            best = hit
    return best, E


def _simulate_continuous(st: MoveSetup, R: float, *, max_pieces: int = 200_000,
                         settle_factor: float = 15.0, tail_rtol: float = 1e-9):
    rows = _Rows(st, R)
    modes = _modes(rows)
    h = _step_size(modes)
    Z = np.zeros(rows.m)
    Z[rows.n] = 1.0
    k = _choose(modes, Z)
    # a step enters at t = 0+: the state is zero, the mode follows from the conditions
    # the linear loop without the actuator's state (a rate-limited actuator adds one that
    # only tracks the command): its slowest mode and its equilibrium (the final value)
    from dataclasses import replace
    plain = _Rows(replace(st, rate=math.inf), R)
    lin = _modes(plain)[0]
    decay = _slowest(lin.M)
    if decay <= 0:
        raise UnstableLoopError("the linear loop is not stable; no large move to simulate")
    t = 0.0
    ts, Zs, hs, ks = [], [], [], []
    in_linear_since = 0.0 if k == 0 else None
    powers: dict = {}
    block = 64

    def add(t0, Zrows, hh, kk):
        n_ = len(Zrows)
        ts.extend(t0 + hh * np.arange(n_))
        Zs.extend(Zrows)
        hs.extend([hh] * n_)
        ks.extend([kk] * n_)

    while True:
        md = modes[k]
        if k not in powers:
            # E^1 .. E^block of the mode's step: a block of steps propagated at once, then
            # screened for a condition that may leave the mode inside one of its steps
            E = scipy.linalg.expm(md.M * h)
            P = np.empty((block, rows.m, rows.m))
            P[0] = E
            for j in range(1, block):
                P[j] = P[j - 1] @ E
            C = np.array(md.conds).reshape(len(md.conds), rows.m)
            powers[k] = (P, C, C @ md.M)
        P, C, CM = powers[k]
        Zall = np.vstack([Z[None, :], P @ Z])
        first = block
        if C.shape[0]:
            vals, ders = Zall @ C.T, Zall @ CM.T
            tol = 1e-12 * (np.abs(Zall) @ np.abs(C).T)
            tol = tol[:-1] + tol[1:]
            # an interior minimum can dip below the smaller end value by at most about
            # h max|c'| / 2 on a step this short (a 24th of the fastest period)
            low = np.minimum(vals[:-1], vals[1:]) <= h * np.maximum(np.abs(ders[:-1]),
                                                                    np.abs(ders[1:])) + tol
            sus = (vals[1:] < -tol) | ((ders[:-1] < 0) & (ders[1:] > 0) & low)
            hit = np.flatnonzero(sus.any(axis=1))
            if hit.size:
                first = int(hit[0])
        add(t, list(Zall[:first]), h, k)
        t += first * h
        Z = Zall[first]
        if first < block:
            s, _ = _first_exit(md, Z, h)
            if s is None:
                add(t, [Z], h, k)
                Z = Zall[first + 1]
                t += h
            else:
                if s > 0:
                    add(t, [Z], s, k)
                    Z = scipy.linalg.expm(md.M * s) @ Z
                    t += s
                old = k
                k = _choose(modes, Z)
                if k == old:
                    # rounding left the state on the boundary: take the best other mode
                    scores = [(-math.inf if j == old else _forward_ok(m_, Z))
                              for j, m_ in enumerate(modes)]
                    k = int(np.argmax(scores))
                in_linear_since = t if k == 0 else None
        if len(ts) > max_pieces:
            raise ComputeError(f"the large move has not settled after {t:.6g} s "
                               f"({len(ts)} pieces); the saturated loop may cycle (check the "
                               "anti-windup)")
        if k == 0 and in_linear_since is not None and t - in_linear_since > settle_factor / decay:
            break
    ts.append(t)
    Zs.append(Z)
    hs.append(0.0)
    ks.append(k)
    Zs = np.array(Zs)
    # final value: the linear mode's equilibrium (the move ends in the linear mode)
    A, b = lin.M[:-1, :-1], lin.M[:-1, -1]
    x = np.linalg.solve(A, -b)
    final = float(plain.y[:-1] @ x + plain.y[-1])
    sat = []
    cur = None
    for tt, kk in zip(ts, ks):
        if modes[kk].saturated and cur is None:
            cur = tt
        elif not modes[kk].saturated and cur is not None:
            sat.append((cur, tt))
            cur = None
    if cur is not None:
        sat.append((cur, ts[-1]))
    y = Zs @ rows.y
    return MoveResponse(t=np.array(ts), y=y, final=final, saturated=tuple(sat), dt=None,
                        Z=Zs, h=np.array(hs), mode=np.array(ks), modes=tuple(modes),
                        C=rows.y)


def simulate_move(F, K, G, H, loop, amplitude: float) -> MoveResponse:
    """The large move of one variant (continuous loop): blocks as made by
    :func:`~ledger.engine.blocks.make_block`, ``loop`` a
    :class:`~ledger.engine.loop.LoopSpec` without delays."""
    return _simulate_continuous(move_setup(F, K, G, H, loop), float(amplitude))
