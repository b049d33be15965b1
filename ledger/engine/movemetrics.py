"""Large-move metrics over a group of variants, and digital loops sample by sample (the
continuous pieces and the loop's modes are in :mod:`ledger.engine.moves`; definitions in
docs/metrics.md, large moves)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from ..errors import ComputeError, UnstableLoopError
from .moves import MoveResponse, _brent, _simulate_continuous, move_setup, simulate_move
from .simulation import _hermite_extremum

#: interior extrema refined exactly per metric (the largest estimates; the rest cannot win)
_REFINE = 4

__all__ = ["MoveMetrics", "move_metrics", "move_metrics_group", "simulate_digital_moves",
           "move_responses"]


# --------------------------------------------------------------------------- digital loops
def simulate_digital_moves(setups: list, R: float, decay: np.ndarray, *, settle_factor: float = 15.0,
                      max_samples: int = 200_000):
    """Every variant of a group sample by sample at once (orders shared).  Returns
    ``(y (V, N), saturated (V, N) bool)``; ``y[:, k]`` is the output at ``k Ts``."""
    st0 = setups[0]
    ts = st0.dt
    F, (ri, A0, B0, C0, D0), _, H = st0.blocks
    Gs = [st.blocks[2] for st in setups]
    V = len(setups)
    Ag = np.stack([G.A for G in Gs])
    Bg = np.stack([G.B for G in Gs])
    Cg = np.stack([G.C for G in Gs])
    U, Rt, scheme, kb = st0.limit, st0.rate, st0.scheme, st0.kb
    xf = np.zeros(F.order)
    x0 = np.zeros((V, A0.shape[0]))
    xi = np.zeros(V)
    xg = np.zeros((V, Ag.shape[1]))
    xh = np.zeros((V, H.order))
    v = np.zeros(V)
    ys, sats = [], []
    need = settle_factor / np.maximum(decay, 1e-300)
    last_sat = np.zeros(V)
    k = 0
    while True:
        y = np.einsum("vi,vi->v", Cg, xg) if Ag.shape[1] else np.zeros(V)
        ym = (xh @ H.C if H.order else 0.0) + H.D * y
        rf = (F.C @ xf if F.order else 0.0) + F.D * R
        e = rf - ym
        uc = xi + (x0 @ C0 if A0.shape[0] else 0.0) + D0 * e
        cmd = np.clip(uc, -U, U)
        v = v + np.clip(cmd - v, -Rt * ts, Rt * ts) if math.isfinite(Rt) else cmd
        sat = np.abs(v - uc) > 1e-12 * np.maximum(np.abs(uc), 1e-300)
        ys.append(y)
        sats.append(sat)
        last_sat = np.where(sat, k * ts, last_sat)
        if scheme == "clamping":
            stop = sat & (ri * e * (uc - v) > 0)
            xi = np.where(stop, xi, xi + ri * e)
        elif scheme == "back-calculation":
            xi = xi + ri * e + kb * ts * (v - uc)
        else:
            xi = xi + ri * e
        if A0.shape[0]:
            x0 = x0 @ A0.T + np.outer(e, B0)
        if F.order:
            xf = F.A @ xf + F.B * R
        xh_next = (xh @ H.A.T + np.outer(y, H.B)) if H.order else xh
        if Ag.shape[1]:
            xg = np.einsum("vij,vj->vi", Ag, xg) + Bg * v[:, None]
        xh = xh_next
        k += 1
        if k * ts > float(np.max(last_sat + need)) and k > 2:
            break
        if k > max_samples:
            raise ComputeError(f"the large move has not settled after {k} samples; the "
                               "saturated loop may cycle (check the anti-windup)")
    return np.array(ys).T, np.array(sats).T


# --------------------------------------------------------------------------- metrics
@dataclass(frozen=True)
class MoveMetrics:
    """Large-move metrics per variant: settling time (s), overshoot (%), time saturated (s)
    and peak output rate (output units per s)."""

    settling_time: np.ndarray
    overshoot: np.ndarray
    time_saturated: np.ndarray
    peak_rate: np.ndarray


def _piece_fn(resp: MoveResponse, k: int, row_of):
    M = resp.modes[resp.mode[k]].M
    Z = resp.Z[k]
    r = row_of(M)
    return lambda s: float(r @ scipy.linalg.expm(M * s) @ Z)


def _continuous_metrics(resp: MoveResponse, band: float, peak_rtol: float = 1e-9):
    C, yf = resp.C, resp.final
    K = resp.t.size - 1
    Za, Zb = resp.Z[:K], resp.Z[1:]
    ya, yb = Za @ C, Zb @ C
    rows1 = np.array([C @ md.M for md in resp.modes])
    rows2 = np.array([C @ md.M @ md.M for md in resp.modes])
    CM, CMM = rows1[resp.mode[:K]], rows2[resp.mode[:K]]
    da = np.einsum("ki,ki->k", CM, Za)
    db = np.einsum("ki,ki->k", CM, Zb)
    aa = np.einsum("ki,ki->k", CMM, Za)
    ab = np.einsum("ki,ki->k", CMM, Zb)
    h = resp.h[:K]
    sgn = 1.0 if yf >= 0 else -1.0
    # extrema of y inside pieces: each estimated by the cubic Hermite interpolant of the end
    # values and slopes, the few largest (the only ones that can set the maximum) refined by
    # Brent on the exact y'
    te = np.full(K, np.nan)
    ye = np.full(K, np.nan)
    ext = np.flatnonzero(da * db < 0)
    if ext.size:
        se, ve = _hermite_extremum(ya[ext], yb[ext], da[ext], db[ext], h[ext])
        te[ext], ye[ext] = se, ve
    cand = np.concatenate([ya, yb])
    top = ext[np.argsort(-sgn * ye[ext])[:_REFINE]] if ext.size else ext
    for k in top:
        f = _piece_fn(resp, k, lambda M: C @ M)
        te[k] = _brent(f, 0.0, h[k], da[k], db[k], h[k])
        ye[k] = _piece_fn(resp, k, lambda M: C)(te[k])
    qmax = float(max(np.max(sgn * cand), np.max(sgn * ye[top]) if top.size else -math.inf))
    a = abs(yf)
    over = 100.0 * (qmax - a) / a if qmax > a * (1 + peak_rtol) else 0.0
    # peak rate: |y'| at piece ends and at the largest extrema of y' inside pieces
    rate = [np.max(np.abs(da)), np.max(np.abs(db))]
    ext2 = np.flatnonzero(aa * ab < 0)
    if ext2.size:
        _, v2 = _hermite_extremum(da[ext2], db[ext2], aa[ext2], ab[ext2], h[ext2])
        for k in ext2[np.argsort(-np.abs(v2))[:_REFINE]]:
            f = _piece_fn(resp, k, lambda M: C @ M @ M)
            sm = _brent(f, 0.0, h[k], aa[k], ab[k], h[k])
            rate.append(abs(_piece_fn(resp, k, lambda M: C @ M)(sm)))
    peak_rate = float(max(rate))
    # settling: the last time |y - yf| exceeds the band
    bw = band * a
    out_a = np.abs(ya - yf) > bw
    out_b = np.abs(yb - yf) > bw
    out_e = np.isfinite(ye) & (np.abs(np.nan_to_num(ye) - yf) > bw)
    # a Hermite estimate near the band edge is refined before it decides the last exit
    near = np.flatnonzero(np.isfinite(ye) & (np.abs(np.abs(np.nan_to_num(ye) - yf) - bw)
                                             < 0.05 * bw))
    for k in near[-_REFINE:]:
        f = _piece_fn(resp, k, lambda M: C @ M)
        te[k] = _brent(f, 0.0, h[k], da[k], db[k], h[k])
        ye[k] = _piece_fn(resp, k, lambda M: C)(te[k])
    out_e = np.isfinite(ye) & (np.abs(np.nan_to_num(ye) - yf) > bw)
    anyk = np.flatnonzero(out_a | out_b | out_e)
    if anyk.size == 0:
        settle = 0.0
    else:
        k = int(anyk[-1])
        if out_b[k]:
            raise ComputeError("the large move is still outside the settling band at the end "
                               "of the simulation")
        f = _piece_fn(resp, k, lambda M: C)
        if out_e[k]:
            lo, ref = te[k], ye[k]
        else:
            lo, ref = 0.0, ya[k]
        level = yf + (bw if ref > yf else -bw)
        g = lambda s: f(s) - level  # noqa: E731
        s_hit = _brent(g, lo, h[k], g(lo), g(h[k]), h[k])
        settle = float(resp.t[k] + s_hit)
    tsat = float(sum(b - a_ for a_, b in resp.saturated))
    return settle, over, tsat, peak_rate


def _digital_metrics(y: np.ndarray, sat: np.ndarray, yf: np.ndarray, ts: float, band: float,
                     peak_rtol: float = 1e-9):
    V, N = y.shape
    sgn = np.where(yf >= 0, 1.0, -1.0)
    a = np.abs(yf)
    qmax = np.max(sgn[:, None] * y, axis=1)
    over = np.where(qmax > a * (1 + peak_rtol), 100.0 * (qmax - a) / a, 0.0)
    ex = np.abs(y - yf[:, None]) > band * a[:, None]
    anyex = ex.any(axis=1)
    last = N - 1 - np.argmax(ex[:, ::-1], axis=1)
    if np.any(anyex & (last == N - 1)):
        raise ComputeError("the large move is still outside the settling band at the end of "
                           "the simulation")
    settle = np.where(anyex, (last + 1) * ts, 0.0)
    rate = np.max(np.abs(np.diff(y, axis=1)), axis=1) / ts if N > 1 else np.zeros(V)
    tsat = sat.sum(axis=1) * ts
    return settle, over, tsat.astype(float), rate


def _amplitude(s) -> float:
    R = s["move"]
    if isinstance(R, str):
        raise ComputeError(f"move {R!r} has a unit; the ledger reads it in the plant's output "
                           "unit, the engine takes a number in that unit")
    return float(R)


def _rows_of(b, m):
    """The variants ``m`` of an :class:`~ledger.engine.types.SSBatch`."""
    return b.take(m)


def move_metrics_group(plan, g, mask: np.ndarray, s: dict) -> MoveMetrics:
    """Large-move metrics of the variants ``mask`` of one planned group (``plan``: the
    :class:`~ledger.engine.loop.Plan`; ``g``: its :class:`~ledger.engine.loop.LoopGroup`)."""
    R = _amplitude(s)
    band = float(s["settling_band"])
    if s.get("settling_basis", "final") == "step":
        raise ComputeError("large-move settling is relative to the final value; "
                           "settling_basis 'step' is not offered")
    loop = plan.loop
    if loop.sample_time is None and g.tau > 0:
        raise ComputeError("large-move metrics need a continuous loop without delays or a "
                           "digital loop (the delay makes the pieces infinite-dimensional)")
    F, K, H = plan.blocks
    Gs = [g.blocks[1][int(j)] for j in np.flatnonzero(mask)]
    setups = [move_setup(F, K, G, H, loop) for G in Gs]
    n = len(setups)
    if loop.sample_time is not None:
        from .timeresp import final_value

        yf = np.asarray(final_value(_rows_of(g.paths["r->y"], mask), R), float)
        ts = loop.sample_time
        poles = [g.poles[int(j)] for j in np.flatnonzero(mask)]
        decay = np.array([float(np.min(-np.log(np.maximum(np.abs(p), 1e-300)))) / ts
                          if np.size(p) else 1.0 / ts for p in poles])
        if np.any(decay <= 0):
            raise UnstableLoopError("the linear loop is not stable; no large move to simulate")
        y, sat = simulate_digital_moves(setups, R, decay)
        st, ov, tsat, rate = _digital_metrics(y, sat, yf, ts, band)
        return MoveMetrics(st, ov, tsat, rate)
    out = np.zeros((4, n))
    for j, stp in enumerate(setups):
        resp = _simulate_continuous(stp, R)
        out[:, j] = _continuous_metrics(resp, band)
    return MoveMetrics(*out)


def move_metrics(F, K, G, H, loop, amplitude: float, *, settling_band: float = 0.02):
    """``(settling time, overshoot, time saturated, peak rate)`` of one continuous variant."""
    return _continuous_metrics(simulate_move(F, K, G, H, loop, amplitude), settling_band)


def _runs(mask: np.ndarray, ts: float) -> tuple:
    """``(start, end)`` times of the runs of True in a sample mask (sample k covers
    ``[k ts, (k + 1) ts)``)."""
    out, k, n = [], 0, mask.size
    while k < n:
        if mask[k]:
            j = k
            while j < n and mask[j]:
                j += 1
            out.append((k * ts, j * ts))
            k = j
        else:
            k += 1
    return tuple(out)


def move_responses(asm, amplitude: float, *, points: int = 800) -> dict:
    """For plots: the large move of every variant of an assembly (a
    :class:`~ledger.engine.loop.Assembly`), ``name -> (t, y, saturated intervals, final)``;
    continuous loops sampled exactly at ``points`` times and at every switching instant,
    digital loops at their samples."""
    from .blocks import make_block

    loop = asm.loop
    R = float(amplitude)
    F = make_block(1.0 if loop.prefilter is None else loop.prefilter, "prefilter")
    out = {}
    for g in asm.groups:
        K, Gs, H = g.blocks
        if loop.sample_time is None and g.tau > 0:
            raise ComputeError("large-move metrics need a continuous loop without delays or a "
                               "digital loop (the delay makes the pieces infinite-dimensional)")
        setups = [move_setup(F, K, G, H, loop) for G in Gs]
        names = [asm.variants[int(i)] for i in np.asarray(g.index)]
        if loop.sample_time is not None:
            from .timeresp import final_value

            ts = loop.sample_time
            yf = np.asarray(final_value(g.paths["r->y"], R), float)
            decay = np.array([float(np.min(-np.log(np.maximum(np.abs(p), 1e-300)))) / ts
                              if np.size(p) else 1.0 / ts for p in g.poles])
            y, sat = simulate_digital_moves(setups, R, decay)
            t = np.arange(y.shape[1]) * ts
            for j, n in enumerate(names):
                out[n] = (t, y[j], _runs(sat[j], ts), float(yf[j]))
            continue
        for n, st in zip(names, setups):
            resp = _simulate_continuous(st, R)
            t = np.union1d(np.linspace(0.0, float(resp.t[-1]), points), resp.t)
            out[n] = (t, resp.at(t), resp.saturated, resp.final)
    return out
