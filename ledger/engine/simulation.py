"""Exact sampled step responses on the grid of :func:`~ledger.engine.timegrid.horizon` (see the
module docstring of :mod:`ledger.engine.timegrid` for the propagation)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ledger.engine.ssbatch import _channel, balance, equilibrium, expm_batch, has_delay, mats
from ledger.engine.timegrid import TimeGrid, horizon
from ledger.engine.types import SSBatch
from ledger.errors import ComputeError, UnstableLoopError

__all__ = ["Pieces", "simulate"]


# --------------------------------------------------------------------------- simulation
@dataclass(frozen=True)
class Pieces:
    """Exact response on each grid step ``[t_k, t_{k+1}]``, made by :func:`simulate`.

    On step ``k``: ``y(t_k + s) = Cy expm(M s) Z0[:, k]`` for ``0 <= s <= t_{k+1} - t_k``.
    Times in seconds without ``io_delay``; outputs in output units.
    """

    t: np.ndarray          # (N,) sample times, no io_delay
    M: np.ndarray          # (V, m, m) augmented generator
    Cy: np.ndarray         # (V, m) augmented output row
    Z0: np.ndarray         # (V, N-1, m) augmented state at the start of each step
    ya: np.ndarray         # (V, N-1) y at t_k (right limit)
    yb: np.ndarray         # (V, N-1) y at t_{k+1} (left limit)
    te: np.ndarray         # (V, N-1) time of the interior extremum, NaN if none
    ye: np.ndarray         # (V, N-1) its value (an estimate until refined, see timeresp)
    final: np.ndarray      # (V,)
    io_delay: float
    discrete: bool
    da: np.ndarray | None = None     # (V, N-1) y' at t_k (right limit)
    db: np.ndarray | None = None     # (V, N-1) y' at t_{k+1} (left limit)
    exact: np.ndarray | None = None  # (V, N-1) True where te, ye are refined (or absent)


def _propagate(E: np.ndarray, out: np.ndarray) -> None:
    """Fill ``out[:, k] = E^k out[:, 0]`` for k >= 1, in blocks of powers: out (V, K+1, m)."""
    V, K1, m = out.shape
    nsteps = K1 - 1
    if nsteps <= 0:
        return
    b = max(1, min(nsteps, int(math.sqrt(nsteps)) + 1))
    P = np.empty((V, b, m, m))
    P[:, 0] = E
    for j in range(1, b):
        P[:, j] = P[:, j - 1] @ E
    k = 0
    while k < nsteps:
        j = min(b, nsteps - k)
        # one (j m, m) @ (m, 1) product per variant (rows of all j powers stacked)
        out[:, k + 1:k + 1 + j] = (P[:, :j].reshape(V, j * m, m)
                                   @ out[:, k, :, None]).reshape(V, j, m)
        k += j


#: the last delay-free propagation: (((dt, u, A shape, A, B), grid segments), states (a
#: read-only view), the buffer holding them)
_LAST_PROPAGATION: list = [None]


def _sim_nodelay(sys: SSBatch, u: float, grid: TimeGrid):
    A, B, C, D = mats(sys)
    V, n = A.shape[0], A.shape[1]
    M = np.zeros((V, n + 1, n + 1))
    M[:, :n, :n] = A
    M[:, :n, n] = B
    Cy = np.concatenate([C, D[:, None]], axis=1)
    # the states depend on (A, B, u, grid) only: paths that share them (r->y and r->u of one
    # loop) share one propagation.  A grid whose segments begin with those of the last one
    # (a horizon extended by :meth:`TimeGrid.extended`) continues it from its last state, and
    # a grid that is a prefix of the last one reads its first samples: the same operations in
    # the same order, so the states are bitwise those of a propagation from t = 0.
    # The states are written into a buffer with room for one doubling of the horizon at the
    # last step when that is at most a quarter more samples (most responses are extended
    # once, for the tail test), so an extension continues in place instead of copying.
    key = (sys.dt, u, A.shape, A.tobytes(), B.tobytes())
    segs = tuple(grid.segments)
    N = grid.nsamples
    last = _LAST_PROPAGATION[0]
    Z = None
    start, k = 0, 0
    buf = None
    if last is not None and last[0][0] == key:
        lsegs, Zl, bl = last[0][1], last[1], last[2]
        if segs[:len(lsegs)] == lsegs:
            start, k = len(lsegs), Zl.shape[1] - 1
            if bl.shape[1] >= N:
                buf = bl
            else:
                buf = np.empty((V, N, n + 1))
                buf[:, :Zl.shape[1]] = Zl
        elif lsegs[:len(segs)] == segs:
            Z = Zl[:, :N]
    if Z is None:
        if buf is None:
            extra = grid.extended(2.0).nsamples - N
            room = extra if extra * 4 <= N else 0
            buf = np.empty((V, N + room, n + 1))             # augmented states at the samples
            buf[:, 0, :n] = 0.0
            buf[:, 0, n] = u
        for h, count in segs[start:]:
            if sys.dt is not None:
                E = np.zeros_like(M)
                E[:, :n, :n] = A
                E[:, :n, n] = B
                E[:, n, n] = 1.0
            else:
                E = expm_batch(M * h)
            _propagate(E, buf[:, k:k + count + 1])
            k += count
        Z = buf[:, :N]
        Z.flags.writeable = False
        _LAST_PROPAGATION[0] = ((key, segs), Z, buf)
    if sys.dt is not None:
        y = (Z @ Cy[:, :, None])[..., 0]
        return M, Cy, Z[:, :-1], y[:, :-1], y[:, 1:], None, None, Z[:, -1, :n]
    W = np.stack([Cy, np.einsum("vm,vmk->vk", Cy, M)], axis=2)     # (V, m, 2): y and y'
    yd = Z @ W
    y, dy = yd[..., 0], yd[..., 1]
    return M, Cy, Z[:, :-1], y[:, :-1], y[:, 1:], dy[:, :-1], dy[:, 1:], Z[:, -1, :n]


def _hermite_matrix(L: int, h: float) -> np.ndarray:
    """Map from ``[wR, wL, w'R, w'L]`` at ``L + 1`` points to ``p0..p3`` of the ``L`` steps.

    Returns ndarray ``(4 L, 4 (L + 1))``; ``p`` of step ``i`` are the value and first three
    derivatives at its start of the cubic with end values ``wR_i, wL_{i+1}`` and end slopes
    ``w'R_i, w'L_{i+1}`` (cubic Hermite interpolation).
    """
    H = np.zeros((L, 4, L + 1, 4))
    i = np.arange(L)
    H[i, 0, i, 0] = 1.0                                  # p0 = w0
    H[i, 1, i, 2] = 1.0                                  # p1 = d0
    # p2 = 2 (3 (w1 - w0) / h^2 - (2 d0 + d1) / h)
    H[i, 2, i + 1, 1] = 6.0 / h ** 2
    H[i, 2, i, 0] = -6.0 / h ** 2
    H[i, 2, i, 2] = -4.0 / h
    H[i, 2, i + 1, 3] = -2.0 / h
    # p3 = 6 ((d0 + d1) / h^2 - 2 (w1 - w0) / h^3)
    H[i, 3, i, 2] = 6.0 / h ** 2
    H[i, 3, i + 1, 3] = 6.0 / h ** 2
    H[i, 3, i + 1, 1] = -12.0 / h ** 3
    H[i, 3, i, 0] = 12.0 / h ** 3
    return H.reshape(4 * L, 4 * (L + 1))


def _sim_delay(sys: SSBatch, u: float, grid: TimeGrid, *, block: int = 16):
    """Method of steps with a cubic Hermite hold of the delayed signal (see ``timeresp``).

    Propagates blocks of at most ``min(lag, block)`` steps, each by one precomputed linear
    map from (state at the block start, delayed-signal values and slopes) to (states, values
    and slopes of ``z`` at the block's steps).
    """
    A, B, C, D = mats(sys)
    Bw, Cz, Dz, Dw, Dzw = _channel(sys)
    V, n = A.shape[0], A.shape[1]
    h = grid.segments[0][0]
    count = sum(c for _, c in grid.segments)
    tau = float(sys.tau)
    lag = int(round(tau / h))
    if lag < 1 or abs(lag * h - tau) > 1e-9 * tau:
        raise ComputeError(f"delay step h={h:g} s does not divide tau={tau:g} s; use horizon()")
    # Z = [x; u; p0; p1; p2; p3]: w(t_k + s) = p0 + p1 s + p2 s^2 / 2 + p3 s^3 / 6 is made by
    # the chain of integrators p0' = p1, p1' = p2, p2' = p3, p3' = 0.
    m = n + 5
    M = np.zeros((V, m, m))
    M[:, :n, :n] = A
    M[:, :n, n] = B
    M[:, :n, n + 1] = Bw
    M[:, n + 1, n + 2] = 1.0
    M[:, n + 2, n + 3] = 1.0
    M[:, n + 3, n + 4] = 1.0
    Cy = np.concatenate([C, D[:, None], Dw[:, None], np.zeros((V, 3))], axis=1)
    E = expm_batch(M * h)[:, :n, :]                         # (V, n, m)
    Ex, Eu, Ep = E[:, :, :n], E[:, :, n] * u, E[:, :, n + 1:]
    CzA = np.einsum("vi,vij->vj", Cz, A)
    CzBu = np.einsum("vi,vi->v", Cz, B) * u
    CzBw = np.einsum("vi,vi->v", Cz, Bw)
    L = min(lag, block)
    N = count + 1
    # q[:, lag + k] = (zR, zL, z'R, z'L) at t_k, so q[:, k] = (wR, wL, w'R, w'L) at t_k
    # (zero history before t = 0).
    q = np.zeros((V, N + lag, 4))
    q[:, lag, 0] = Dz * u
    q[:, lag, 2] = CzBu
    x = np.zeros((V, N, n))
    # One block of L steps from t_k0:
    #   x_{k0+i} = Ex^i x_k0 + sum_{l<i} Ex^(i-1-l) (Eu + Ep p_l),  p = H w,  i = 1..L,
    #   (zR, zL, z'R, z'L)_{k0+i} = Kx x_{k0+i} + Kw w_{k0+i} + kc.
    pw = np.empty((V, L + 1, n, n))                          # Ex^0 .. Ex^L
    pw[:, 0] = np.eye(n)
    for i in range(1, L + 1):
        pw[:, i] = pw[:, i - 1] @ Ex
    ii, ll = np.meshgrid(np.arange(L), np.arange(L), indexing="ij")
    toe = np.where((ll <= ii)[None, :, :, None, None], pw[:, np.clip(ii - ll, 0, L)], 0.0)
    Gx = pw[:, 1:].reshape(V, L * n, n)
    Gp = (toe @ Ep[:, None, None]).transpose(0, 1, 3, 2, 4).reshape(V, L * n, L * 4)
    Gc = (toe @ Eu[:, None, None, :, None]).sum(axis=2).reshape(V, L * n)
    Gw = Gp @ _hermite_matrix(L, h)                          # (V, L n, 4 (L + 1))
    Kx1 = np.zeros((V, 4, n))
    Kx1[:, 0] = Kx1[:, 1] = Cz
    Kx1[:, 2] = Kx1[:, 3] = CzA
    Kw1 = np.zeros((V, 4, 4))
    Kw1[:, 0, 0] = Kw1[:, 1, 1] = Dzw
    Kw1[:, 2, 0] = Kw1[:, 3, 1] = CzBw
    Kw1[:, 2, 2] = Kw1[:, 3, 3] = Dzw
    kc1 = np.stack([Dz * u, Dz * u, CzBu, CzBu], axis=1)     # (V, 4)
    Kx = np.zeros((V, L * 4, L * n))
    Kw = np.zeros((V, L * 4, 4 * (L + 1)))
    for i in range(L):
        Kx[:, 4 * i:4 * i + 4, n * i:n * i + n] = Kx1
        Kw[:, 4 * i:4 * i + 4, 4 * (i + 1):4 * (i + 2)] = Kw1
    # rows: x (L n) then z values (4 L); columns: x_k0 (n) then w at k0..k0+L (4 (L + 1))
    G = np.concatenate([np.concatenate([Gx, Gw], axis=2),
                        np.concatenate([Kx @ Gx, Kx @ Gw + Kw], axis=2)], axis=1)
    c = np.concatenate([Gc, (Kx @ Gc[:, :, None])[..., 0] + np.tile(kc1, (1, L))], axis=1)
    for k0 in range(0, N - 1, L):
        Lb = min(L, N - 1 - k0)
        if Lb == L:
            Gb, cb = G, c
        else:
            rows = np.concatenate([np.arange(Lb * n), L * n + np.arange(4 * Lb)])
            Gb, cb = G[:, rows, :n + 4 * (Lb + 1)], c[:, rows]
        rhs = np.concatenate([x[:, k0], q[:, k0:k0 + Lb + 1].reshape(V, 4 * (Lb + 1))], axis=1)
        out = (Gb @ rhs[:, :, None])[..., 0] + cb
        x[:, k0 + 1:k0 + Lb + 1] = out[:, :Lb * n].reshape(V, Lb, n)
        q[:, lag + k0 + 1:lag + k0 + Lb + 1] = out[:, Lb * n:].reshape(V, Lb, 4)
    w = q[:, :N]                                             # (V, N, 4): wR, wL, w'R, w'L
    P = np.concatenate([w[:, :-1], w[:, 1:]], axis=2) @ _hermite_matrix(1, h).T   # (V, N-1, 4)
    uu = np.full((V, N - 1, 1), u)
    Z0 = np.concatenate([x[:, :-1], uu, P], axis=2)
    P1 = np.stack([w[:, 1:, 1], w[:, 1:, 3], P[:, :, 2] + h * P[:, :, 3], P[:, :, 3]], axis=2)
    Z1 = np.concatenate([x[:, 1:], uu, P1], axis=2)
    CyM = np.einsum("vm,vmk->vk", Cy, M)
    ya = (Z0 @ Cy[:, :, None])[..., 0]
    yb = (Z1 @ Cy[:, :, None])[..., 0]
    da = (Z0 @ CyM[:, :, None])[..., 0]
    db = (Z1 @ CyM[:, :, None])[..., 0]
    return M, Cy, Z0, ya, yb, da, db, (x, q[:, lag:, 0])


def _settled(yb, yf, yscale, tail_rtol, window, t):
    """True when ``|y - yf|`` stayed below ``tail_rtol * yscale`` over the last ``window`` steps.

    The window is at least a tenth of the horizon (1.5 time constants of the slowest mode
    with the default grid), so a slow mode cannot hide in it behind a zero crossing.
    """
    late = int(np.count_nonzero(t[-yb.shape[1]:] >= 0.9 * t[-1]))
    w = min(yb.shape[1], max(window, late, 20))
    dev = np.max(np.abs(yb[:, -w:] - yf[:, None]), axis=1)
    return bool(np.all(dev <= tail_rtol * yscale))


def simulate(sys: SSBatch, amplitude: float, *, tail_rtol: float, max_samples: int,
              singular_rcond: float = 1e-12, **grid_kw) -> Pieces:
    """Exact step response of every variant on the grid of :func:`horizon`.

    Parameters
    ----------
    sys : SSBatch
    amplitude : float
        Step amplitude, input units.
    tail_rtol : float
        The horizon is doubled until ``|y - yf|`` stays below ``tail_rtol`` times the largest
        ``|y|`` over the last tenth of the horizon (and, with a delay, the last two delays;
        the delayed signal ``z`` is checked the same way).
    max_samples : int
        Bound on the samples; beyond it :class:`ComputeError` (no delay) or
        :class:`UnstableLoopError` (delay: the loop did not settle).
    singular_rcond : float, default 1e-12
        See :func:`equilibrium`.
    **grid_kw
        Passed to :func:`horizon`.

    Returns
    -------
    Pieces
    """
    u = float(amplitude)
    sys = balance(sys)
    xss, wss, yf = equilibrium(sys, u, singular_rcond)
    delay = has_delay(sys)
    grid = horizon(sys, max_samples=max_samples, **grid_kw)
    while True:
        if delay:
            M, Cy, Z0, ya, yb, da, db, tail = _sim_delay(sys, u, grid)
        else:
            M, Cy, Z0, ya, yb, da, db, _ = _sim_nodelay(sys, u, grid)
        yscale = np.maximum(np.maximum(np.max(np.abs(ya), axis=1), np.abs(yb[:, -1])), np.abs(yf))
        yscale = np.where(yscale > 0, yscale, 1.0)
        if delay:
            lag = int(round(float(sys.tau) / grid.dt))
            _, zR = tail
            zscale = np.max(np.abs(zR), axis=1)
            ok = (_settled(yb, yf, yscale, tail_rtol, 2 * lag + 1, grid.t)
                  and _settled(zR[:, 1:], wss, np.where(zscale > 0, zscale, 1.0), tail_rtol,
                               2 * lag + 1, grid.t))
        else:
            ok = sys.nstate == 0 or _settled(yb, yf, yscale, tail_rtol, 0, grid.t)
        if ok:
            break
        nxt = grid.extended(2.0)
        if nxt.nsamples > max_samples:
            msg = (f"step response has not settled after {grid.t_end:.6g} s"
                   f" ({grid.nsamples} samples, max_samples={max_samples})")
            if delay:
                raise UnstableLoopError(msg + "; the delayed loop is probably unstable or too"
                                        " lightly damped: check its margins")
            raise ComputeError(msg + "; raise max_samples")
        grid = nxt
    t = grid.t
    Vn, K = ya.shape
    te = np.full((Vn, K), np.nan)
    ye = np.full((Vn, K), np.nan)
    exact = np.ones((Vn, K), dtype=bool)
    if da is not None:
        vi, ki = np.nonzero(da * db < 0)
        if vi.size:
            h = np.diff(t)[ki]
            se, ve = _hermite_extremum(ya[vi, ki], yb[vi, ki], da[vi, ki], db[vi, ki], h)
            te[vi, ki] = t[ki] + se
            ye[vi, ki] = ve
            exact[vi, ki] = False
    return Pieces(t=t, M=M, Cy=Cy, Z0=Z0, ya=ya, yb=yb, te=te, ye=ye, final=yf,
                   io_delay=float(sys.io_delay or 0.0), discrete=sys.dt is not None,
                   da=da, db=db, exact=exact)


def _hermite_extremum(y0, y1, d0, d1, h):
    """Estimate of the interior extremum of the cubic Hermite interpolant (d0 d1 < 0)."""
    dd = (y1 - y0) / h
    c2 = (3 * dd - 2 * d0 - d1) / h
    c3 = (d0 + d1 - 2 * dd) / h ** 2
    disc = np.maximum(c2 * c2 - 3 * c3 * d0, 0.0)
    q = -(c2 + np.where(c2 >= 0, 1.0, -1.0) * np.sqrt(disc))
    with np.errstate(divide="ignore", invalid="ignore"):
        r1 = q / (3 * c3)
        r2 = d0 / q
    sec = h * d0 / (d0 - d1)
    s = np.where((r2 > 0) & (r2 < h), r2, np.where((r1 > 0) & (r1 < h), r1, sec))
    s = np.where(np.isfinite(s), s, sec)
    return s, y0 + s * (d0 + s * (c2 + s * c3))
