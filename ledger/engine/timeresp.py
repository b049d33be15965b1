"""Exact step responses and step metrics of batches of closed-loop systems.

Every function takes an :class:`~ledger.engine.types.SSBatch` of ``V`` variants and works on
all of them at once (numpy batched operations over the variant axis).

How the response is made exact
------------------------------
* Continuous, no internal delay: the state is augmented with the (constant) input,
  ``Z = [x; u]``, ``Z' = M Z`` with ``M = [[A, B], [0, 0]]``; one step of length ``h`` is
  ``Z(t + h) = expm(M h) Z(t)``, which is the zero-order-hold-exact discretisation of a step,
  exact at every sample (no approximation beyond rounding).
* Discrete: the difference equation at the sample instants; metrics are read at the samples.
* Continuous with an internal delay ``tau``: method of steps on a grid ``h = tau / m``; on each
  step the delayed input ``w`` is the straight line between its (known, past) end values and the
  linear part is integrated exactly for that ramp with ``Z = [x; u; w; w']``,
  ``M = [[A, B, Bw, 0], [0, 0, 0, 0], [0, 0, 0, 1], [0, 0, 0, 0]]``.  The only error is the
  first-order hold of ``w``: second order, ``O(h^2)`` (halving ``h`` divides the error by about
  four).  Jumps of ``w`` and ``y`` at multiples of ``tau`` fall on grid points and are kept as
  left and right limits.
* ``io_delay`` shifts the whole response (zero before it).

Between samples the response on each step is ``y(t_k + s) = Cy expm(M s) Z_k`` with
``y' = Cy M expm(M s) Z_k`` and ``y'' = Cy M^2 expm(M s) Z_k``.  Every extremum (sign change of
``y'`` over a step) and every level crossing is refined on that exact expression by a bracketed
Newton iteration (quadratic convergence, bisection safeguard), vectorised over all problems at
once; this plays the role of a scalar root finder (brentq) applied per problem.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from ledger.engine.timegrid import TimeGrid, check_stable, horizon
from ledger.engine.types import SSBatch
from ledger.errors import ComputeError, UnstableLoopError

__all__ = [
    "StepResponse",
    "StepMetrics",
    "final_value",
    "step_response",
    "evaluate_at",
    "step_metrics",
    "peak_abs",
    "recovery",
]


# --------------------------------------------------------------------------- matrices
def _mats(sys: SSBatch):
    A = np.asarray(sys.A, dtype=float)
    V, n = A.shape[0], A.shape[1]
    B = np.asarray(sys.B, dtype=float).reshape(V, n)
    C = np.asarray(sys.C, dtype=float).reshape(V, n)
    D = np.asarray(sys.D, dtype=float).reshape(V)
    for name, arr in (("A", A), ("B", B), ("C", C), ("D", D)):
        if not np.all(np.isfinite(arr)):
            raise ComputeError(f"matrix {name} of the closed loop holds NaN or inf; check the model")
    return A, B, C, D


def _channel(sys: SSBatch):
    V, n = sys.nvar, sys.nstate

    def get(x, shape):
        return np.zeros(shape) if x is None else np.asarray(x, dtype=float).reshape(shape)

    return (get(sys.Bw, (V, n)), get(sys.Cz, (V, n)), get(sys.Dz, (V,)),
            get(sys.Dw, (V,)), get(sys.Dzw, (V,)))


def _has_delay(sys: SSBatch) -> bool:
    return sys.dt is None and float(sys.tau or 0.0) > 0.0


# --------------------------------------------------------------------------- final value
def _equilibrium(sys: SSBatch, amplitude: float, singular_rcond: float):
    """Return (x_ss (V,n), w_ss (V,), y_ss (V,)) for a constant input ``amplitude``."""
    A, B, C, D = _mats(sys)
    V, n = A.shape[0], A.shape[1]
    u = float(amplitude)
    Aeq = A - np.eye(n) if sys.dt is not None else A
    delay = _has_delay(sys)
    if delay:
        Bw, Cz, Dz, Dw, Dzw = _channel(sys)
        Meq = np.zeros((V, n + 1, n + 1))
        Meq[:, :n, :n] = Aeq
        Meq[:, :n, n] = Bw
        Meq[:, n, :n] = Cz
        Meq[:, n, n] = Dzw - 1.0
        rhs = -np.concatenate([B, Dz[:, None]], axis=1) * u
    else:
        Meq, rhs = Aeq, -B * u
    if Meq.shape[1] > 0:
        sv = np.linalg.svd(Meq, compute_uv=False)
        rc = np.where(sv[:, 0] > 0, sv[:, -1] / np.where(sv[:, 0] > 0, sv[:, 0], 1.0), 0.0)
        bad = rc < singular_rcond
        if np.any(bad):
            idx = np.nonzero(bad)[0].tolist()
            raise ComputeError(
                f"equilibrium is singular for variant(s) {idx[:10]} (reciprocal condition"
                f" {float(rc[bad][0]):.2e}): the output integrates a step (pole at"
                f" {'z=1' if sys.dt is not None else 's=0'}), so there is no final value;"
                " use a path without a free integrator")
        sol = np.linalg.solve(Meq, rhs[:, :, None])[:, :, 0]
    else:
        sol = np.zeros((V, 0))
    x = sol[:, :n]
    if delay:
        w = sol[:, n]
        y = np.einsum("vi,vi->v", C, x) + D * u + Dw * w
    else:
        w = np.zeros(V)
        y = np.einsum("vi,vi->v", C, x) + D * u
    return x, w, y


def final_value(sys: SSBatch, amplitude: float = 1.0, *, singular_rcond: float = 1e-12) -> np.ndarray:
    """Steady-state output for a step, by the final-value theorem from the matrices.

    Solves the equilibrium ``0 = A x + B u + Bw w`` (discrete: ``x = A x + B u``) with
    ``w = z = Cz x + Dz u + Dzw w`` and returns ``C x + D u + Dw w``.

    Parameters
    ----------
    sys : SSBatch
    amplitude : float, default 1
        Step amplitude, in input units.
    singular_rcond : float, default 1e-12
        Reciprocal condition number of the equilibrium matrix below which it counts as singular.

    Returns
    -------
    ndarray (V,)
        Final value, output units.

    Raises
    ------
    ComputeError
        The equilibrium is singular (integrating output).
    UnstableLoopError
        A continuous (no delay) or discrete batch has an eigenvalue that is not strictly stable
        (the theorem does not apply).  Delayed loops are checked by :func:`step_response`.
    """
    _, _, y = _equilibrium(sys, amplitude, singular_rcond)
    if not _has_delay(sys):
        check_stable(sys)
    return y


# --------------------------------------------------------------------------- simulation
@dataclass(frozen=True)
class _Pieces:
    """Exact response on each grid step ``[t_k, t_{k+1}]`` (internal)."""

    t: np.ndarray          # (N,) sample times, no io_delay
    M: np.ndarray          # (V, m, m) augmented generator
    Cy: np.ndarray         # (V, m) augmented output row
    Z0: np.ndarray         # (V, N-1, m) augmented state at the start of each step
    ya: np.ndarray         # (V, N-1) y at t_k (right limit)
    yb: np.ndarray         # (V, N-1) y at t_{k+1} (left limit)
    te: np.ndarray         # (V, N-1) time of the interior extremum, NaN if none
    ye: np.ndarray         # (V, N-1) its value (an estimate until refined by _refine)
    final: np.ndarray      # (V,)
    io_delay: float
    discrete: bool
    da: np.ndarray | None = None     # (V, N-1) y' at t_k (right limit)
    db: np.ndarray | None = None     # (V, N-1) y' at t_{k+1} (left limit)
    exact: np.ndarray | None = None  # (V, N-1) True where te, ye are refined (or absent)


def _propagate(E: np.ndarray, z0: np.ndarray, nsteps: int) -> np.ndarray:
    """States ``E^k z0`` for k = 0..nsteps, blocked: (V, nsteps+1, m)."""
    V, m = z0.shape
    out = np.empty((V, nsteps + 1, m))
    out[:, 0] = z0
    b = max(1, min(nsteps, int(math.sqrt(nsteps)) + 1))
    P = np.empty((b, V, m, m))
    P[0] = E
    for j in range(1, b):
        P[j] = P[j - 1] @ E
    k = 0
    while k < nsteps:
        j = min(b, nsteps - k)
        out[:, k + 1:k + 1 + j] = np.moveaxis((P[:j] @ out[:, k, :, None])[..., 0], 0, 1)
        k += j
    return out


def _sim_nodelay(sys: SSBatch, u: float, grid: TimeGrid):
    A, B, C, D = _mats(sys)
    V, n = A.shape[0], A.shape[1]
    M = np.zeros((V, n + 1, n + 1))
    M[:, :n, :n] = A
    M[:, :n, n] = B
    Cy = np.concatenate([C, D[:, None]], axis=1)
    z = np.zeros((V, n + 1))
    z[:, n] = u
    parts = [z[:, None, :]]
    for h, count in grid.segments:
        if sys.dt is not None:
            E = np.zeros_like(M)
            E[:, :n, :n] = A
            E[:, :n, n] = B
            E[:, n, n] = 1.0
        else:
            E = scipy.linalg.expm(M * h)
        blk = _propagate(E, parts[-1][:, -1], count)
        parts.append(blk[:, 1:])
    Z = np.concatenate(parts, axis=1)                       # (V, N, m)
    y = (Z @ Cy[:, :, None])[..., 0]
    if sys.dt is not None:
        return M, Cy, Z[:, :-1], y[:, :-1], y[:, 1:], None, None, Z[:, -1, :n]
    dy = (Z @ np.einsum("vm,vmk->vk", Cy, M)[:, :, None])[..., 0]
    return M, Cy, Z[:, :-1], y[:, :-1], y[:, 1:], dy[:, :-1], dy[:, 1:], Z[:, -1, :n]


def _sim_delay(sys: SSBatch, u: float, grid: TimeGrid):
    A, B, C, D = _mats(sys)
    Bw, Cz, Dz, Dw, Dzw = _channel(sys)
    V, n = A.shape[0], A.shape[1]
    h = grid.segments[0][0]
    count = sum(c for _, c in grid.segments)
    tau = float(sys.tau)
    lag = int(round(tau / h))
    if lag < 1 or abs(lag * h - tau) > 1e-9 * tau:
        raise ComputeError(f"delay step h={h:g} s does not divide tau={tau:g} s; use horizon()")
    m = n + 3
    M = np.zeros((V, m, m))
    M[:, :n, :n] = A
    M[:, :n, n] = B
    M[:, :n, n + 1] = Bw
    M[:, n + 1, n + 2] = 1.0
    Cy = np.concatenate([C, D[:, None], Dw[:, None], np.zeros((V, 1))], axis=1)
    E = scipy.linalg.expm(M * h)[:, :n, :]                  # (V, n, m)
    N = count + 1
    x = np.zeros((V, N, n))
    zR = np.zeros((V, N))
    zL = np.zeros((V, N))
    wR = np.zeros((V, N))
    wL = np.zeros((V, N))
    zR[:, 0] = Dz * u
    for k in range(N - 1):
        wL[:, k + 1] = zL[:, k + 1 - lag] if k + 1 >= lag else 0.0
        wR[:, k + 1] = zR[:, k + 1 - lag] if k + 1 >= lag else 0.0
        slope = (wL[:, k + 1] - wR[:, k]) / h
        zk = np.concatenate([x[:, k], np.full((V, 1), u), wR[:, k, None], slope[:, None]], axis=1)
        x[:, k + 1] = np.einsum("vim,vm->vi", E, zk)
        cx = np.einsum("vi,vi->v", Cz, x[:, k + 1]) + Dz * u
        zR[:, k + 1] = cx + Dzw * wR[:, k + 1]
        zL[:, k + 1] = cx + Dzw * wL[:, k + 1]
    slope = (wL[:, 1:] - wR[:, :-1]) / h                   # (V, N-1)
    uu = np.full((V, N - 1, 1), u)
    Z0 = np.concatenate([x[:, :-1], uu, wR[:, :-1, None], slope[:, :, None]], axis=2)
    Z1 = np.concatenate([x[:, 1:], uu, wL[:, 1:, None], slope[:, :, None]], axis=2)
    CyM = np.einsum("vm,vmk->vk", Cy, M)
    ya = np.einsum("vnm,vm->vn", Z0, Cy)
    yb = np.einsum("vnm,vm->vn", Z1, Cy)
    da = np.einsum("vnm,vm->vn", Z0, CyM)
    db = np.einsum("vnm,vm->vn", Z1, CyM)
    return M, Cy, Z0, ya, yb, da, db, (x, zR)


def _settled(yb, yf, yscale, tail_rtol, window, t):
    """True when ``|y - yf|`` stayed below ``tail_rtol * yscale`` over the last ``window`` steps.

    The window is at least a tenth of the horizon (1.5 time constants of the slowest mode
    with the default grid), so a slow mode cannot hide in it behind a zero crossing.
    """
    late = int(np.count_nonzero(t[-yb.shape[1]:] >= 0.9 * t[-1]))
    w = min(yb.shape[1], max(window, late, 20))
    dev = np.max(np.abs(yb[:, -w:] - yf[:, None]), axis=1)
    return bool(np.all(dev <= tail_rtol * yscale))


def _simulate(sys: SSBatch, amplitude: float, *, tail_rtol: float, max_samples: int,
              singular_rcond: float = 1e-12, **grid_kw) -> _Pieces:
    u = float(amplitude)
    xss, wss, yf = _equilibrium(sys, u, singular_rcond)
    delay = _has_delay(sys)
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
    return _Pieces(t=t, M=M, Cy=Cy, Z0=Z0, ya=ya, yb=yb, te=te, ye=ye, final=yf,
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


def _refine(p: _Pieces, levels=(), near_extremes: bool = True, margin: float = 1e-2) -> None:
    """Refine, in place, the estimated extrema that can change a metric.

    An estimate is refined when it lies within ``margin`` (fraction of the largest ``|y|`` of
    its variant) of a decision level in ``levels`` (each an ndarray (V,), output units) or of
    the largest or smallest value of that variant.  The cubic-Hermite estimate errs by about
    ``(h |lam|)^4 / 384`` of a mode amplitude (below 1e-5 with the default grid), so estimates
    left alone are on the right side of every level and are never the extreme value.
    """
    if p.discrete:
        return
    todo = ~p.exact & np.isfinite(p.te)
    if not np.any(todo):
        return
    scale = np.maximum(np.max(np.abs(p.ya), axis=1), np.max(np.abs(p.yb), axis=1))
    tol = (margin * np.where(scale > 0, scale, 1.0))[:, None]
    near = np.zeros_like(todo)
    for lv in levels:
        near |= np.abs(p.ye - np.asarray(lv, dtype=float)[:, None]) <= tol
    if near_extremes:
        fin = np.isfinite(p.ye)
        hi = np.maximum(np.max(np.where(fin, p.ye, -np.inf), axis=1),
                        np.maximum(p.ya.max(axis=1), p.yb.max(axis=1)))
        lo = np.minimum(np.min(np.where(fin, p.ye, np.inf), axis=1),
                        np.minimum(p.ya.min(axis=1), p.yb.min(axis=1)))
        with np.errstate(invalid="ignore"):
            near |= (p.ye >= hi[:, None] - tol) | (p.ye <= lo[:, None] + tol)
    vi, ki = np.nonzero(todo & near)
    if vi.size == 0:
        return
    h = np.diff(p.t)[ki]
    P = _Problems(p.M, p.Cy, p.Z0, vi, ki)
    s, val = _solve(P, np.zeros(vi.size), h, p.da[vi, ki], p.db[vi, ki], 0.0, order=1)
    p.te[vi, ki] = p.t[ki] + s
    p.ye[vi, ki] = val
    p.exact[vi, ki] = True


# --------------------------------------------------------------------------- refinement
@dataclass(frozen=True)
class _Problems:
    M: np.ndarray
    Cy: np.ndarray
    Z0: np.ndarray
    v: np.ndarray
    k: np.ndarray

    def eval(self, idx: np.ndarray, s: np.ndarray):
        """y, y', y'' at ``t_k + s`` for the problems ``idx``."""
        v, k = self.v[idx], self.k[idx]
        Mv = self.M[v]
        E = scipy.linalg.expm(Mv * s[:, None, None])
        Z = np.einsum("pab,pb->pa", E, self.Z0[v, k])
        MZ = np.einsum("pab,pb->pa", Mv, Z)
        MMZ = np.einsum("pab,pb->pa", Mv, MZ)
        Cy = self.Cy[v]
        return (np.einsum("pa,pa->p", Cy, Z), np.einsum("pa,pa->p", Cy, MZ),
                np.einsum("pa,pa->p", Cy, MMZ))


def _solve(P: _Problems, lo, hi, f_lo, f_hi, level, *, order: int, xtol: float = 1e-13,
           maxiter: int = 100):
    """Bracketed Newton for ``y^(order)(t_k + s) = level`` with ``s`` in ``[lo, hi]``.

    ``f_lo`` and ``f_hi`` are the function values minus ``level`` at the bracket ends and have
    opposite signs (or one is zero).  Returns ``(s, y(t_k + s))``.
    """
    lo = np.array(lo, dtype=float)
    hi = np.array(hi, dtype=float)
    f_lo = np.asarray(f_lo, dtype=float)
    f_hi = np.asarray(f_hi, dtype=float)
    level = np.broadcast_to(np.asarray(level, dtype=float), lo.shape).copy()
    width = hi - lo
    den = f_lo - f_hi
    frac = np.where(den != 0, f_lo / np.where(den != 0, den, 1.0), 0.5)
    s = lo + np.clip(frac, 0.0, 1.0) * width
    s = np.where(f_lo == 0, lo, np.where(f_hi == 0, hi, s))
    sign_lo = np.sign(f_lo)
    active = np.nonzero((f_lo != 0) & (f_hi != 0))[0]
    tol = xtol * np.maximum(width, 1e-300)
    for _ in range(maxiter):
        if active.size == 0:
            break
        y, d1, d2 = P.eval(active, s[active])
        f = (y, d1)[order] - level[active]
        g = (d1, d2)[order]
        same = np.sign(f) == sign_lo[active]
        lo[active] = np.where(same, s[active], lo[active])
        hi[active] = np.where(same, hi[active], s[active])
        with np.errstate(divide="ignore", invalid="ignore"):
            newton = s[active] - f / g
        inside = np.isfinite(newton) & (newton > lo[active]) & (newton < hi[active])
        new = np.where(inside, newton, 0.5 * (lo[active] + hi[active]))
        done = (np.abs(new - s[active]) <= tol[active]) | (f == 0) | \
               (hi[active] - lo[active] <= tol[active])
        s[active] = np.where(f == 0, s[active], new)
        active = active[~done]
    else:
        raise ComputeError("refinement of a crossing did not converge; report this system")
    val = P.eval(np.arange(s.size), s)[0] if s.size else s
    return s, val


# --------------------------------------------------------------------------- response
@dataclass(frozen=True)
class StepResponse:
    """Exact step response samples.

    Attributes
    ----------
    t : ndarray (N,)
        Sample times, seconds, including ``io_delay`` (a sample at 0 with y = 0 is prepended
        when ``io_delay > 0``).
    y : ndarray (V, N)
        Output at the samples (right limits where the response jumps), output units.
    final : ndarray (V,)
        Final value by the final-value theorem, output units.
    amplitude : float
        Step amplitude, input units.
    dt : float or None
        Sample time of a discrete batch.
    """

    t: np.ndarray
    y: np.ndarray
    final: np.ndarray
    amplitude: float
    dt: float | None


def step_response(sys: SSBatch, *, amplitude: float = 1.0, t=None, tail_rtol: float = 1e-6,
                  max_samples: int = 200_000, **grid_kw) -> StepResponse:
    """Exact step response of every variant.

    Parameters
    ----------
    sys : SSBatch
    amplitude : float, default 1
        Step amplitude, input units.
    t : array_like or None
        Times (s) at which to return the response (continuous without internal delay only,
        evaluated exactly by :func:`evaluate_at`); default: the grid of :func:`horizon`.
    tail_rtol : float, default 1e-6
        The horizon is doubled until the remaining state deviation, seen at the output, is below
        ``tail_rtol`` times the largest output magnitude.
    max_samples : int, default 200000
        Bound on the number of samples.
    **grid_kw
        Passed to :func:`~ledger.engine.timegrid.horizon`.

    Returns
    -------
    StepResponse
    """
    if t is not None:
        tt = np.asarray(t, dtype=float)
        yf = final_value(sys, amplitude)
        return StepResponse(t=tt, y=evaluate_at(sys, tt, amplitude=amplitude), final=yf,
                            amplitude=float(amplitude), dt=sys.dt)
    p = _simulate(sys, amplitude, tail_rtol=tail_rtol, max_samples=max_samples, **grid_kw)
    y = np.concatenate([p.ya, p.yb[:, -1:]], axis=1)
    tt = p.t + p.io_delay
    if p.io_delay > 0:
        tt = np.concatenate([[0.0], tt])
        y = np.concatenate([np.zeros((y.shape[0], 1)), y], axis=1)
    return StepResponse(t=tt, y=y, final=p.final, amplitude=float(amplitude), dt=sys.dt)


def evaluate_at(sys: SSBatch, t_points, *, amplitude: float = 1.0) -> np.ndarray:
    """Exact step response at arbitrary times (continuous, no internal delay).

    ``y(t) = [C D] expm(M (t - io_delay)) [0; u]`` with ``M = [[A, B], [0, 0]]``; zero before
    ``io_delay``; ``y(0) = D u`` is the value just after the step.

    Parameters
    ----------
    sys : SSBatch
    t_points : array_like (P,)
        Times, seconds.
    amplitude : float, default 1

    Returns
    -------
    ndarray (V, P)
    """
    if sys.dt is not None or _has_delay(sys):
        raise ComputeError("evaluate_at needs a continuous system without internal delay;"
                           " use step_response for discrete or delayed loops")
    A, B, C, D = _mats(sys)
    V, n = A.shape[0], A.shape[1]
    tp = np.asarray(t_points, dtype=float).ravel() - float(sys.io_delay or 0.0)
    M = np.zeros((V, n + 1, n + 1))
    M[:, :n, :n] = A
    M[:, :n, n] = B
    Cy = np.concatenate([C, D[:, None]], axis=1)
    out = np.zeros((V, tp.size))
    pos = np.nonzero(tp >= 0)[0]
    if pos.size:
        E = scipy.linalg.expm(M[:, None] * tp[pos][None, :, None, None])   # (V, P, m, m)
        out[:, pos] = np.einsum("vm,vpm->vp", Cy, E[:, :, :, n]) * float(amplitude)
    return out


# --------------------------------------------------------------------------- metrics
@dataclass(frozen=True)
class StepMetrics:
    """Step metrics per variant, each an ndarray (V,).

    Attributes
    ----------
    rise_time : s, from the first time y reaches ``rise_limits[0] * yf`` to the first time it
        reaches ``rise_limits[1] * yf``.
    settling_time : s, last time ``|y - yf|`` exceeds the band (0 if never; discrete: the first
        sample from which every later sample is inside the band).
    overshoot : percent, ``100 (peak - |yf|) / |yf|`` on ``y sign(yf)``; 0 if never above.
    undershoot : percent, ``100 max(-y sign(yf)) / |yf|``; 0 if never on the wrong side.
    peak_time : s, time of the maximum of ``y sign(yf)``; ``inf`` when the response never
        exceeds its final value (the supremum is only approached as t -> inf).
    peak : max of ``y sign(yf)`` (output units; ``|yf|`` when never exceeded).
    final_value : output units, by the final-value theorem.
    """

    rise_time: np.ndarray
    settling_time: np.ndarray
    overshoot: np.ndarray
    undershoot: np.ndarray
    peak_time: np.ndarray
    peak: np.ndarray
    final_value: np.ndarray


def _extreme(p: _Pieces, sgn: np.ndarray, largest: bool, absolute: bool = False):
    """Largest (or smallest) of ``sgn y`` (or ``|y|``) over samples and extrema, and its time.

    Ties go to the earliest time.  Returns (value (V,), time (V,)), io_delay not added.
    """
    V, K = p.ya.shape
    rows = np.arange(V)
    fill = -np.inf if largest else np.inf
    best_v = np.full(V, fill)
    best_t = np.zeros(V)
    # (values, times); start-of-step values first so that equal values keep the earliest time
    for vals, times in ((p.ya, 0), (p.ye, p.te), (p.yb, 1)):
        q = np.abs(vals) if absolute else vals * sgn[:, None]
        q = np.where(np.isnan(q), fill, q)
        i = np.argmax(q, axis=1) if largest else np.argmin(q, axis=1)
        v = q[rows, i]
        if isinstance(times, int):
            t = p.t[i + times]             # start (0) or end (1) of step i
        else:
            t = times[rows, i]
        better = (v > best_v) if largest else (v < best_v)
        tie = (v == best_v) & (t < best_t)
        take = better | tie
        best_v = np.where(take, v, best_v)
        best_t = np.where(take, t, best_t)
    return best_v, best_t


def _first_reach(p: _Pieces, sgn: np.ndarray, L: np.ndarray) -> np.ndarray:
    """First time ``sgn * y >= L`` (per variant), refined; io_delay not added."""
    V, K = p.ya.shape
    rows = np.arange(V)
    if p.discrete:
        q = sgn[:, None] * np.concatenate([p.ya, p.yb[:, -1:]], axis=1)
        hit = q >= L[:, None]
        if not np.all(hit.any(axis=1)):
            raise ComputeError("step response never reaches a rise-time level; check rise_limits")
        return p.t[np.argmax(hit, axis=1)]
    qa, qb = sgn[:, None] * p.ya, sgn[:, None] * p.yb
    qe = np.where(np.isnan(p.ye), -np.inf, sgn[:, None] * np.nan_to_num(p.ye))
    Lc = L[:, None]
    hit = (qa >= Lc) | (qb >= Lc) | (qe >= Lc)
    if not np.all(hit.any(axis=1)):
        raise ComputeError("step response never reaches a rise-time level; check rise_limits")
    k = np.argmax(hit, axis=1)
    qa, qb, qe, te = qa[rows, k], qb[rows, k], qe[rows, k], p.te[rows, k]
    tk = p.t[k]
    h = p.t[k + 1] - tk
    res = tk.copy()
    at_start = qa >= L
    ext = np.isfinite(te)
    up = ~at_start & ext & (qe >= L)
    down = ~at_start & ext & ~(qe >= L)
    plain = ~at_start & ~ext
    lo = np.where(down, te - tk, 0.0)
    hi = np.where(up, te - tk, h)
    flo = np.where(down, qe, qa) - L
    fhi = np.where(up, qe, qb) - L
    sel = np.nonzero(up | down | plain)[0]
    if sel.size:
        P = _Problems(p.M, p.Cy, p.Z0, sel, k[sel])
        s, _ = _solve(P, lo[sel], hi[sel], sgn[sel] * flo[sel], sgn[sel] * fhi[sel],
                      sgn[sel] * L[sel], order=0)
        res[sel] = tk[sel] + s
    return res


def _last_exceed(p: _Pieces, c: np.ndarray, band: np.ndarray) -> np.ndarray:
    """Last time ``|y - c| > band`` (per variant; 0 if never), refined; io_delay not added."""
    V, K = p.ya.shape
    rows = np.arange(V)
    msg = ("response is still outside the band at the end of the horizon; the band is tighter"
           " than the horizon resolves (raise tail accuracy or widen the band)")
    if p.discrete:
        e = np.concatenate([p.ya, p.yb[:, -1:]], axis=1) - c[:, None]
        ex = np.abs(e) > band[:, None]
        anyex = ex.any(axis=1)
        last = ex.shape[1] - 1 - np.argmax(ex[:, ::-1], axis=1)
        if np.any(anyex & (last == ex.shape[1] - 1)):
            raise ComputeError(msg)
        return np.where(anyex, p.t[np.minimum(last + 1, ex.shape[1] - 1)], 0.0)
    ea, eb = p.ya - c[:, None], p.yb - c[:, None]
    ee = p.ye - c[:, None]
    bc = band[:, None]
    ex = (np.abs(ea) > bc) | (np.abs(eb) > bc) | (np.nan_to_num(np.abs(ee)) > bc)
    anyex = ex.any(axis=1)
    k = K - 1 - np.argmax(ex[:, ::-1], axis=1)
    ea, eb, ee, te = ea[rows, k], eb[rows, k], ee[rows, k], p.te[rows, k]
    tk = p.t[k]
    h = p.t[k + 1] - tk
    jump = anyex & (np.abs(eb) > band)
    if np.any(jump & (k == K - 1)):
        raise ComputeError(msg)
    res = np.where(anyex, p.t[np.minimum(k + 1, K)], 0.0)
    ext = np.isfinite(te)
    tail = anyex & ~jump & ext & (np.abs(np.nan_to_num(ee)) > band)
    head = anyex & ~jump & ~tail
    sig = np.where(tail, np.sign(np.nan_to_num(ee)), np.sign(ea))
    lo = np.where(tail, te - tk, 0.0)
    hi = np.where(head & ext, te - tk, h)
    flo = np.where(tail, ee, ea) - sig * band
    fhi = np.where(head & ext, ee, eb) - sig * band
    sel = np.nonzero(tail | head)[0]
    if sel.size:
        P = _Problems(p.M, p.Cy, p.Z0, sel, k[sel])
        s, _ = _solve(P, lo[sel], hi[sel], flo[sel], fhi[sel], c[sel] + sig[sel] * band[sel],
                      order=0)
        res[sel] = tk[sel] + s
    return res


def _shift_settle(ts: np.ndarray, c: np.ndarray, band: np.ndarray, io_delay: float) -> np.ndarray:
    """Settling/recovery time with the output held at 0 during ``io_delay``."""
    if io_delay <= 0:
        return ts
    out_before = np.abs(c) > band
    return np.where(out_before | (ts > 0), ts + io_delay, 0.0)


def _sup_abs(p: _Pieces):
    v, t = _extreme(p, np.ones(p.ya.shape[0]), largest=True, absolute=True)
    lim = np.abs(p.final)
    never = v < lim
    return np.where(never, lim, v), np.where(never, np.inf, t + p.io_delay)


def step_metrics(sys: SSBatch, *, amplitude: float = 1.0, rise_limits=(0.1, 0.9),
                 settling_band: float = 0.02, settling_basis: str = "final",
                 peak_rtol: float = 1e-9, zero_rtol: float = 1e-9, tail_rtol: float = 1e-6,
                 max_samples: int = 200_000, **grid_kw) -> StepMetrics:
    """Rise and settling time, overshoot, undershoot and peak of the exact step response.

    Parameters
    ----------
    sys : SSBatch
    amplitude : float, default 1
        Step amplitude, input units.
    rise_limits : (float, float), default (0.1, 0.9)
        Fractions of the final value that start and end the rise.
    settling_band : float, default 0.02
        Half-width of the settling band as a fraction (0.02 = 2 %).
    settling_basis : {"final", "step"}, default "final"
        Band relative to ``|yf|`` or to ``|amplitude|``.
    peak_rtol : float, default 1e-9
        Overshoot and undershoot smaller than this fraction of ``|yf|`` count as none
        (rounding of the propagation).
    zero_rtol : float, default 1e-9
        ``|yf|`` below this fraction of ``sup |y|`` is a zero final value.
    tail_rtol, max_samples, **grid_kw
        See :func:`step_response`.

    Returns
    -------
    StepMetrics

    Raises
    ------
    ComputeError
        Zero final value (relative metrics undefined: use :func:`recovery`), singular
        equilibrium, or bad options.
    UnstableLoopError
        Unstable loop.
    """
    lo_f, hi_f = (float(r) for r in rise_limits)
    if not 0.0 <= lo_f < hi_f <= 1.0:
        raise ComputeError(f"rise_limits {rise_limits!r} must satisfy 0 <= low < high <= 1")
    if settling_basis not in ("final", "step"):
        raise ComputeError(f"settling_basis {settling_basis!r} must be 'final' or 'step'")
    if not settling_band > 0:
        raise ComputeError(f"settling_band {settling_band!r} must be positive")
    p = _simulate(sys, amplitude, tail_rtol=tail_rtol, max_samples=max_samples, **grid_kw)
    yf = p.final
    sgn0 = np.where(yf >= 0, 1.0, -1.0)
    a0 = np.abs(yf)
    band0 = settling_band * (a0 if settling_basis == "final" else np.full_like(a0, abs(amplitude)))
    _refine(p, (sgn0 * lo_f * a0, sgn0 * hi_f * a0, yf + band0, yf - band0))
    sup, _ = _sup_abs(p)
    if np.any(np.abs(yf) <= zero_rtol * sup) or np.any(yf == 0):
        idx = np.nonzero((np.abs(yf) <= zero_rtol * sup) | (yf == 0))[0].tolist()
        raise ComputeError(f"final value is zero for variant(s) {idx[:10]}, so rise, settling and"
                           " overshoot relative to it are undefined; use recovery() instead")
    sgn = np.sign(yf)
    a = np.abs(yf)
    d = p.io_delay
    t_lo = np.where(lo_f > 0, _first_reach(p, sgn, lo_f * a) + d, 0.0)
    t_hi = _first_reach(p, sgn, hi_f * a) + d
    band = settling_band * (a if settling_basis == "final" else np.full_like(a, abs(amplitude)))
    ts = _shift_settle(_last_exceed(p, yf, band), yf, band, d)
    qmax, tmax = _extreme(p, sgn, largest=True)
    qmin, _ = _extreme(p, sgn, largest=False)
    over = qmax > a * (1.0 + peak_rtol)
    overshoot = np.where(over, 100.0 * (qmax - a) / a, 0.0)
    peak = np.where(over, qmax, np.maximum(qmax, a))
    peak_time = np.where(over, tmax + d, np.inf)
    under = -qmin > peak_rtol * a
    undershoot = np.where(under, -100.0 * qmin / a, 0.0)
    return StepMetrics(rise_time=t_hi - t_lo, settling_time=ts, overshoot=overshoot,
                       undershoot=undershoot, peak_time=peak_time, peak=peak, final_value=yf)


def peak_abs(sys: SSBatch, *, amplitude: float = 1.0, tail_rtol: float = 1e-6,
             max_samples: int = 200_000, **grid_kw):
    """Supremum of ``|y(t)|`` over ``t >= 0`` for a step, including the jump at ``t = 0+``.

    Parameters
    ----------
    sys : SSBatch
    amplitude : float, default 1
        Step amplitude, input units.
    tail_rtol, max_samples, **grid_kw
        See :func:`step_response`.

    Returns
    -------
    value : ndarray (V,)
        ``sup |y|``, output units (e.g. peak control effort on the r->u path).
    time : ndarray (V,)
        Time of the supremum, s; ``inf`` when it is only approached as t -> inf (``|yf|``).
    """
    p = _simulate(sys, amplitude, tail_rtol=tail_rtol, max_samples=max_samples, **grid_kw)
    _refine(p)
    return _sup_abs(p)


def recovery(sys: SSBatch, *, amplitude: float = 1.0, band: float = 0.02, basis: str = "peak",
             tail_rtol: float = 1e-6, max_samples: int = 200_000, **grid_kw):
    """Peak and recovery time of a response that may end at zero (e.g. input-disturbance step).

    Parameters
    ----------
    sys : SSBatch
    amplitude : float, default 1
        Step amplitude, input units.
    band : float, default 0.02
        Basis ``"peak"``: fraction of the peak ``sup |y|``; basis ``"absolute"``: output units.
    basis : {"peak", "absolute"}, default "peak"
    tail_rtol, max_samples, **grid_kw
        See :func:`step_response`.

    Returns
    -------
    peak : ndarray (V,)
        ``sup |y|``, output units.
    peak_time : ndarray (V,)
        s (``inf`` when only approached as t -> inf).
    recovery_time : ndarray (V,)
        Last time ``|y - yf|`` exceeds the band, s (0 if never).
    """
    if basis not in ("peak", "absolute"):
        raise ComputeError(f"basis {basis!r} must be 'peak' or 'absolute'")
    if not band > 0:
        raise ComputeError(f"band {band!r} must be positive")
    p = _simulate(sys, amplitude, tail_rtol=tail_rtol, max_samples=max_samples, **grid_kw)
    _refine(p)
    pk, tpk = _sup_abs(p)
    b = band * pk if basis == "peak" else np.full_like(pk, float(band))
    _refine(p, (p.final + b, p.final - b), near_extremes=False)
    b = band * pk if basis == "peak" else np.full_like(pk, float(band))
    rt = _shift_settle(_last_exceed(p, p.final, b), p.final, b, p.io_delay)
    return pk, tpk, rt
