"""Exact frequency-domain kernels: grids, crossovers, peaks and bandwidth.

Every function works on a batch of ``V`` SISO responses at once (variant axis 0).  Grids are
evaluated for all variants in one call of the evaluator; crossings and peaks are then refined per
variant by bracketed root finding or golden-section search, vectorised over all brackets of all
variants at once (see ``_Sampler``, ``_vsolve``, ``_vmaximize``), so no reported number is read
off a grid.

Margins, Nyquist encirclements and disk margins live in :mod:`ledger.engine.margins` and are
re-exported here.

Conventions: frequencies in rad/s, ``w >= 0``; continuous responses are evaluated at ``s = jw``,
discrete ones at ``z = exp(jw dt)`` for ``0 <= w <= pi/dt``.
"""

from __future__ import annotations

import math
import weakref
from dataclasses import dataclass

import numpy as np

from ledger.errors import ComputeError
from ledger.engine.types import FreqBatch

__all__ = [
    "frequency_grid",
    "gain_crossovers",
    "phase_crossovers",
    "peak_gain",
    "bandwidth",
    "estimate_delay",
    "set_known_delay",
    "loop_pairwise",
    "Margins",
    "DiskMargin",
    "margins",
    "encirclements",
    "closed_loop_unstable_count",
    "disk_margin",
]

_TINY = 1e-300

# per-FreqBatch memo of the default grid, delay estimate and crossing set-up (a FreqBatch is
# immutable, and margins, encirclements and disk margins all start from the same grid)
_CACHE: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()


def _memo(fb) -> dict:
    try:
        return _CACHE.setdefault(fb, {})
    except TypeError:          # not weak-referenceable: no memo
        return {}


# ----------------------------------------------------------------------------------------------
# evaluation helpers
# ----------------------------------------------------------------------------------------------

def _call(evaluate, w, nvar: int) -> np.ndarray:
    """Evaluate ``evaluate`` on ``w`` and check the shape; returns complex (V, len(w))."""
    w = np.atleast_1d(np.asarray(w, dtype=float))
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        h = np.asarray(evaluate(w), dtype=complex)
    if h.ndim == 1 and nvar == 1:
        h = h[None, :]
    if h.shape != (nvar, w.size):
        raise ComputeError(
            f"frequency evaluator returned shape {h.shape}, expected {(nvar, w.size)}; "
            "fix the evaluator to return (variants, frequencies)")
    return h


def _s_equivalent(roots, dt) -> np.ndarray:
    """Continuous-time equivalents of poles/zeros (discrete: ``log(z)/dt``; ``z = 0`` dropped)."""
    r = np.asarray(roots, dtype=complex).ravel()
    if dt is None:
        return r
    r = r[np.abs(r) > 1e-12]
    return np.log(r) / dt


@dataclass(frozen=True)
class _AxisRoot:
    """A pole (or zero) on the stability boundary of one variant."""

    variant: int
    w: float          # frequency in rad/s (0 for an integrator, pi/dt for z = -1)
    order: int        # multiplicity


def _axis_roots(roots_list, dt, *, axis_tol: float) -> list[_AxisRoot]:
    """Roots on the imaginary axis (continuous) or unit circle (discrete) at w >= 0, per variant.

    A conjugate pair counts once (at its positive frequency); a real root (s = 0, z = 1, z = -1)
    counts once.  Roots of one variant within ``1e-9`` (relative) of each other form one entry
    whose ``order`` is their number.  Vectorised over all variants; when two distinct boundary
    frequencies of one variant lie within that tolerance the order-dependent grouping of
    :func:`_axis_roots_loop` is used instead.
    """
    P, Pm = _pad(roots_list)
    if P.size == 0:
        return []
    wnyq = math.pi / dt if dt is not None else math.inf
    mag = np.abs(P)
    if dt is None:
        on = Pm & ~(np.abs(P.real) > axis_tol * np.maximum(1.0, mag))
        real_like = np.abs(P.imag) <= axis_tol * np.maximum(1.0, mag)
        with np.errstate(invalid="ignore"):
            wk = np.where(real_like, 0.0, np.abs(P.imag))
    else:
        on = Pm & ~(np.abs(mag - 1.0) > axis_tol)
        real_like = np.abs(P.imag) <= axis_tol
        with np.errstate(invalid="ignore", divide="ignore"):
            wk = np.where(real_like, np.where(P.real > 0, 0.0, wnyq), np.abs(np.angle(P)) / dt)
    on &= real_like | ~(P.imag < 0)
    pos = np.flatnonzero(on.ravel())
    if pos.size == 0:
        return []
    var = pos // P.shape[1]
    wv = wk.ravel()[pos]
    order = np.lexsort((wv, var))
    vs, ws = var[order], wv[order]
    new_var = np.r_[True, vs[1:] != vs[:-1]]
    new_w = np.r_[True, ws[1:] != ws[:-1]]
    start = new_var | new_w
    # distinct frequencies of one variant closer than the grouping tolerance: the sequential
    # grouping depends on the order of the roots, use it as it is
    close = (~new_var) & new_w & (np.r_[np.inf, np.diff(ws)] <= 1e-9 * np.maximum(1.0, ws))
    if close.any():
        return _axis_roots_loop(roots_list, dt, axis_tol=axis_tol)
    gid = np.cumsum(start) - 1
    counts = np.bincount(gid)
    first = np.full(counts.size, pos.size, int)
    np.minimum.at(first, gid, order)
    gv, gw = vs[start], ws[start]
    seq = np.argsort(first, kind="stable")
    return [_AxisRoot(int(gv[g]), float(gw[g]), int(counts[g])) for g in seq]


def _axis_roots_loop(roots_list, dt, *, axis_tol: float) -> list[_AxisRoot]:
    """:func:`_axis_roots` root by root (the reference grouping)."""
    out: list[_AxisRoot] = []
    wnyq = math.pi / dt if dt is not None else math.inf
    for v, roots in enumerate(roots_list):
        groups: list[list] = []
        for rk in np.asarray(roots, dtype=complex).ravel():
            if dt is None:
                if abs(rk.real) > axis_tol * max(1.0, abs(rk)):
                    continue
                real_like = abs(rk.imag) <= axis_tol * max(1.0, abs(rk))
                wk = 0.0 if real_like else abs(rk.imag)
            else:
                if abs(abs(rk) - 1.0) > axis_tol:
                    continue
                real_like = abs(rk.imag) <= axis_tol
                wk = (0.0 if rk.real > 0 else wnyq) if real_like else abs(np.angle(rk)) / dt
            if not real_like and rk.imag < 0:
                continue
            for g in groups:
                if abs(g[0] - wk) <= 1e-9 * max(1.0, wk):
                    g[1] += 1
                    break
            else:
                groups.append([wk, 1])
        out.extend(_AxisRoot(v, float(wk), k) for wk, k in groups)
    return out


# ----------------------------------------------------------------------------------------------
# grids
# ----------------------------------------------------------------------------------------------

def estimate_delay(fb: FreqBatch, *, w_start: float | None = None, w_stop: float | None = None
                   ) -> np.ndarray:
    """Estimate the pure delay in a continuous loop gain, per variant (s).

    Divides the rational part (from ``fb.poles`` and ``fb.zeros``) out of L(jw); what remains is
    ``K exp(-jw tau)`` with constant ``K``.  Its phase is unwrapped along frequencies that double
    from ``w_start`` to ``w_stop`` while predicting the next value with the running slope, so
    delays up to about ``pi / w_start`` seconds are recovered.  Used to set grid density and to
    build the fast exact model that the refinement uses once it is verified (see ``_Sampler``).

    Returns
    -------
    ndarray (V,)
        Delay in seconds, >= 0 (0 for discrete loops, whose delays are poles at z = 0).
    """
    if w_start is None and w_stop is None:
        memo = _memo(fb)
        if "tau" not in memo:
            memo["tau"] = _estimate_delay(fb.evaluate, fb.dt, fb.poles, fb.zeros)
        return memo["tau"].copy()
    return _estimate_delay(fb.evaluate, fb.dt, fb.poles, fb.zeros, w_start=w_start, w_stop=w_stop)


def set_known_delay(fb: FreqBatch, tau) -> None:
    """Record the pure delay of every loop gain of ``fb`` (s, scalar or (V,)) when it is known
    exactly (e.g. from the loop assembly); :func:`estimate_delay` with default arguments then
    returns it instead of estimating it from the response.  Ignored for discrete loops."""
    if fb.dt is not None:
        return
    tau = np.broadcast_to(np.asarray(tau, dtype=float), (fb.nvar,)).copy()
    if not np.all(np.isfinite(tau) & (tau >= 0)):
        raise ComputeError(f"a known loop delay must be finite and >= 0 s; got {tau}")
    _memo(fb)["tau"] = tau


def _estimate_delay(evaluate, dt, poles, zeros, *, w_start=None, w_stop=None) -> np.ndarray:
    nvar = len(poles)
    if dt is not None:
        return np.zeros(nvar)
    feats = [np.abs(np.concatenate([np.ravel(p), np.ravel(z)])) for p, z in zip(poles, zeros)]
    allf = np.concatenate([f[f > 0] for f in feats] + [np.array([1.0])])
    w0 = w_start if w_start is not None else 1e-6 * float(np.min(allf))
    w1 = w_stop if w_stop is not None else 1e3 * float(np.max(allf))
    k = max(2, int(math.ceil(math.log2(w1 / w0))) + 1)
    w = w0 * 2.0 ** np.arange(k)
    L = _call(evaluate, w, nvar)
    x = 1j * w
    tau = np.zeros(nvar)
    P, Pm = _pad(poles)
    Z, Zm = _pad(zeros)
    with np.errstate(divide="ignore", invalid="ignore"):
        ph = (np.angle(L)
              + np.sum(np.where(Pm[:, None, :], np.angle(x[None, :, None] - P[:, None, :]), 0), axis=2)
              - np.sum(np.where(Zm[:, None, :], np.angle(x[None, :, None] - Z[:, None, :]), 0), axis=2))
    # unwrap the delay-free phase residual along the doubling grid, all variants at once
    good = np.all(np.isfinite(ph), axis=1)
    ph = np.where(good[:, None], ph, 0.0)
    theta = ph[:, 0].copy()
    est = np.zeros(nvar)
    two_pi = 2 * math.pi
    for i in range(1, k):
        pred = theta - (w[i] - w[i - 1]) * est
        d = ph[:, i] - pred
        theta = pred + (d - two_pi * np.round(d / two_pi))
        est = -(theta - ph[:, 0]) / (w[i] - w[0])
    tau = np.where(good, np.maximum(est, 0.0), 0.0)
    return tau


def _pad(roots_list) -> tuple[np.ndarray, np.ndarray]:
    """Roots per variant as a padded (V, m) complex array and its validity mask."""
    if roots_list and all(isinstance(r, np.ndarray) and r.ndim == 1 for r in roots_list) \
            and len({r.size for r in roots_list}) == 1:
        out = np.stack(roots_list).astype(complex, copy=False)
        return out, np.ones(out.shape, bool)
    m = max((np.size(r) for r in roots_list), default=0)
    out = np.zeros((len(roots_list), m), complex)
    mask = np.zeros((len(roots_list), m), bool)
    for v, r in enumerate(roots_list):
        r = np.asarray(r, complex).ravel()
        out[v, :r.size] = r
        mask[v, :r.size] = True
    return out, mask


# ----------------------------------------------------------------------------------------------
# batched exact evaluation at one frequency per (variant, point) pair
# ----------------------------------------------------------------------------------------------

class _Sampler:
    """Values of variant ``vi[k]`` at frequency ``x[k]`` for many pairs at once.

    The batch evaluator gives every variant at every frequency, which costs V times too much
    when each variant needs its own points.  So each variant's response is also written as
    ``c exp(-jw tau) prod(x - z) / prod(x - p)`` (``x = jw`` or ``exp(jw dt)``) from its poles,
    zeros and estimated delay, with ``c`` fitted at one grid point; the model is used for a
    variant only if it reproduces the evaluator to ``model_rtol`` (relative) at ``check_points``
    grid points spread over the grid, wherever ``1e-6 <= |H| <= 1e6`` there.  Other variants (e.g. S of a delayed loop, not of that form)
    are evaluated by the batch evaluator, picking the wanted entries.
    """

    def __init__(self, evaluate, dt, poles, zeros, w, H, *, model_rtol: float = 1e-10, tau=None,
                 check_points: int = 64):
        self.evaluate, self.dt, self.nvar = evaluate, dt, len(poles)
        self.P, self.Pm = _pad(poles)
        self.Z, self.Zm = _pad(zeros)
        self.tau = _estimate_delay(evaluate, dt, poles, zeros) if tau is None else np.asarray(tau)
        V = self.nvar
        mm = max(self.P.shape[1], self.Z.shape[1])
        self.Pp, self.Pq, self.Zp, self.Zq = (np.pad(a, ((0, 0), (0, mm - a.shape[1])))
                                              for a in (self.P, self.Pm, self.Z, self.Zm))
        self.c = np.zeros(V, complex)
        self.ok = np.zeros(V, bool)
        w = np.asarray(w, float)
        if w.size > check_points:
            # the model is checked on check_points grid points spread over the whole grid
            pick = np.unique(np.linspace(0, w.size - 1, check_points).round().astype(int))
            w, H = w[pick], H[:, pick]
        n = w.size
        m = max(1, self.P.shape[1] + self.Z.shape[1])
        chunk = max(1, int(2_000_000 // (n * m)))
        for v0 in range(0, V, chunk):
            v1 = min(V, v0 + chunk)
            rows = np.arange(v0, v1)
            R = self._shape_grid(v0, v1, w)
            Hc = H[v0:v1]
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                mag = np.abs(Hc)
                valid = (np.isfinite(Hc) & np.isfinite(R) & (R != 0) & (mag >= 1e-6)
                         & (mag <= 1e6))
                dist = np.where(valid, np.abs(np.log(np.where(valid, mag, 1.0))), np.inf)
                j = np.argmin(dist, axis=1)
                r = np.arange(rows.size)
                c = Hc[r, j] / R[r, j]
                model = c[:, None] * R
                err = np.where(valid, np.abs(model - Hc) / np.where(valid, mag, 1.0), 0.0)
            has = valid.any(axis=1)
            self.c[v0:v1] = np.where(has, c, 0.0)
            self.ok[v0:v1] = has & (np.max(err, axis=1) <= model_rtol)

    def _shape(self, vi, w):
        """The model without ``c``: ``exp(-jw tau) prod(x - z) / prod(x - p)``.

        Zeros and poles are taken in pairs, ``(x - z_k) / (x - p_k)``, so that the running
        product stays of moderate size (no overflow for high orders).
        """
        w = np.asarray(w, float)
        x = (1j * w if self.dt is None else np.exp(1j * w * self.dt))[:, None]
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            num = np.where(self.Zq[vi], x - self.Zp[vi], 1.0)
            den = np.where(self.Pq[vi], x - self.Pp[vi], 1.0)
            r = np.prod(num / den, axis=1)
            if self.dt is None:
                r = r * np.exp(-1j * w * self.tau[vi])
        return r

    def _shape_grid(self, v0, v1, w):
        """``_shape`` of variants ``v0 .. v1-1`` at every frequency of ``w``: (v1-v0, w.size),
        by broadcasting (the same operations in the same order as ``_shape``)."""
        w = np.asarray(w, float)
        x = (1j * w if self.dt is None else np.exp(1j * w * self.dt))[None, :, None]
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            num = np.where(self.Zq[v0:v1, None, :], x - self.Zp[v0:v1, None, :], 1.0)
            den = np.where(self.Pq[v0:v1, None, :], x - self.Pp[v0:v1, None, :], 1.0)
            r = np.prod(num / den, axis=2)
            if self.dt is None:
                r = r * np.exp(-1j * w[None, :] * self.tau[v0:v1, None])
        return r

    def at(self, vi, w) -> np.ndarray:
        """Complex values H_{vi[k]}(w[k])."""
        vi = np.asarray(vi, int)
        w = np.asarray(w, float)
        out = np.empty(w.size, complex)
        m = self.ok[vi]
        if m.any():
            with np.errstate(over="ignore", invalid="ignore"):
                out[m] = self.c[vi[m]] * self._shape(vi[m], w[m])
        if (~m).any():
            uw, inv = np.unique(w[~m], return_inverse=True)
            vals = _call(self.evaluate, uw, self.nvar)
            out[~m] = vals[vi[~m], inv]
        return out


def _vsolve(fun, vi, a, b, fa, fb, *, xrtol: float, maxiter: int = 200) -> np.ndarray:
    """Roots of ``fun(vi, x)`` in the brackets ``[a, b]`` (sign change), all at once.

    Illinois false position (bisection where the secant point leaves the bracket, and for
    every step after the 40th); stops when the bracket is narrower than ``xrtol * b`` or the
    function is exactly zero.
    """
    a, b = np.array(a, float), np.array(b, float)
    fa, fb = np.array(fa, float), np.array(fb, float)
    vi = np.asarray(vi, int)
    root = 0.5 * (a + b)
    side = np.zeros(a.size, int)
    active = np.flatnonzero(b - a > xrtol * b)
    for it in range(maxiter):
        if active.size == 0:
            break
        A, B, FA, FB = a[active], b[active], fa[active], fb[active]
        with np.errstate(divide="ignore", invalid="ignore"):
            c = B - FB * (B - A) / (FB - FA)
        bis = (it >= 40) | ~np.isfinite(c) | (c <= A) | (c >= B)
        c = np.where(bis, 0.5 * (A + B), c)
        fc = np.asarray(fun(vi[active], c), float)
        if not np.all(np.isfinite(fc)):
            k = int(np.flatnonzero(~np.isfinite(fc))[0])
            raise ComputeError(f"crossing refinement met a non-finite value at {c[k]:.6g} rad/s "
                               f"(variant {vi[active][k]}); check the loop near that frequency")
        left = np.sign(fc) == np.sign(FA)          # root lies in [c, B]
        s = side[active]
        na, nfa = np.where(left, c, A), np.where(left, fc, FA)
        nb, nfb = np.where(left, B, c), np.where(left, FB, fc)
        nfb = np.where(left & (s == -1), nfb / 2, nfb)
        nfa = np.where(~left & (s == 1), nfa / 2, nfa)
        side[active] = np.where(left, -1, 1)
        a[active], fa[active], b[active], fb[active] = na, nfa, nb, nfb
        root[active] = c
        done = (fc == 0) | (nb - na <= xrtol * nb)
        root[active[~done]] = 0.5 * (na + nb)[~done]
        active = active[~done]
    return root


def _vmaximize(fun, vi, a, b, *, xrtol: float, maxiter: int = 300) -> tuple[np.ndarray, np.ndarray]:
    """Golden-section search for the maximum of ``fun(vi, x)`` on every ``[a, b]`` at once."""
    g = (math.sqrt(5.0) - 1.0) / 2.0
    a, b = np.array(a, float), np.array(b, float)
    vi = np.asarray(vi, int)
    c, d = b - g * (b - a), a + g * (b - a)
    fc, fd = fun(vi, c), fun(vi, d)
    for _ in range(maxiter):
        act = b - a > xrtol * np.maximum(b, 1e-300)
        if not act.any():
            break
        left = act & (fc >= fd)          # maximum in [a, d]
        right = act & ~left
        b = np.where(left, d, b)
        a = np.where(right, c, a)
        nd = np.where(left, c, d)
        nfd = np.where(left, fc, fd)
        nc = np.where(right, d, c)
        nfc = np.where(right, fd, fc)
        newx = np.where(left, b - g * (b - a), a + g * (b - a))
        idx = np.flatnonzero(act)
        fnew = np.full(a.size, -np.inf)
        fnew[idx] = fun(vi[idx], newx[idx])
        c = np.where(left, newx, nc)
        fc = np.where(left, fnew, nfc)
        d = np.where(right, newx, nd)
        fd = np.where(right, fnew, nfd)
    x = np.where(fc >= fd, c, d)
    return x, np.maximum(fc, fd)


def _grid(evaluate, dt, poles, zeros, *, points_per_decade: int, w_min, w_max,
          resonance_zeta: float, delay=None, axis_tol: float, max_points: int,
          phase_step: float, refine_passes: int, extend_for_loop: bool):
    """Shared grid builder (see :func:`frequency_grid` for the rule); returns (w, values on w
    or None)."""
    nvar = len(poles)
    wnyq = math.pi / dt if dt is not None else math.inf
    # features (continuous-time equivalents of every pole and zero), all variants at once,
    # flattened variant by variant: natural frequency and damping
    R, keep = _pad([np.concatenate([np.ravel(p), np.ravel(z)]).astype(complex)
                    for p, z in zip(poles, zeros)])
    if dt is not None:
        keep &= np.abs(R) > 1e-12
        with np.errstate(divide="ignore", invalid="ignore"):
            R = np.log(np.where(keep, R, 1.0)) / dt
    mag = np.abs(R)
    keep &= mag > 0
    if dt is not None:
        keep &= np.abs(R.imag) <= wnyq * (1 + 1e-12)
    feat_w = mag[keep]
    feat_z = -R.real[keep] / feat_w
    allw = feat_w
    allw = allw[np.isfinite(allw) & (allw > 0)]
    if dt is not None:
        allw = allw[allw > 1e-9 * wnyq]
    fmin = float(np.min(allw)) if allw.size else (1.0 if dt is None else wnyq / 10)
    fmax = float(np.max(allw)) if allw.size else (1.0 if dt is None else wnyq / 10)
    lo = w_min if w_min is not None else fmin / 100.0
    hi = w_max if w_max is not None else (fmax * 100.0 if dt is None else wnyq)
    if dt is not None:
        hi = min(hi, wnyq)
    if not (0 < lo < hi):
        raise ComputeError(f"frequency range [{lo}, {hi}] rad/s is empty; give 0 < w_min < w_max")

    axis = _axis_roots(poles, dt, axis_tol=axis_tol)

    if extend_for_loop and w_min is None and w_max is None:
        lo, hi = _extend_ends(evaluate, dt, poles, zeros, lo, hi, axis, nvar)

    parts = [np.array([0.0, lo, hi])]
    ndec = math.log10(hi / lo)
    parts.append(np.logspace(math.log10(lo), math.log10(hi), max(2, int(ndec * points_per_decade)) + 1))
    if dt is not None:
        order = max((len(p) + len(z) for p, z in zip(poles, zeros)), default=0)
        parts.append(np.linspace(0.0, wnyq, 20 * (order + 2) + 1))
    # lightly damped poles and zeros: points across the resonance width
    t = np.linspace(-10.0, 10.0, 41)
    az = np.abs(feat_z)
    res = (0 < az) & (az < resonance_zeta) & np.isfinite(feat_w)
    if res.any():
        wn, zeta = feat_w[res], feat_z[res]
        wd = wn * np.sqrt(np.maximum(1.0 - zeta * zeta, 0.0))
        parts.append(_resonance_windows(wd, az[res] * wn, t))
        # approach points down to a hundredth of the resonance half-width |zeta| (relative)
        off = np.logspace(-6, -1, 11)
        use = off[None, :] >= 0.01 * az[res][:, None]
        parts.append((wd[:, None] * (1 + off)[None, :])[use])
        parts.append((wd[:, None] * (1 - off)[None, :])[use])
    # boundary poles (integrators, undamped modes): approach them geometrically from both sides
    offsets = np.logspace(-7, -1, 13)
    for ar in axis:
        if ar.w > 0:
            parts.append(ar.w * (1 + offsets))
            parts.append(ar.w * (1 - offsets))
    # pure delays: a linear grid with a fixed phase step of the delay term
    if delay is not None and dt is None:
        tau = float(np.max(delay, initial=0.0))
        if tau * hi > 1e-3:
            step = phase_step / tau
            n = min(int(hi / step) + 1, max_points // 2)
            parts.append(np.linspace(0.0, n * step, n + 1))
    w = np.concatenate(parts)
    w = w[np.isfinite(w) & (w >= 0) & (w <= hi)]
    w = np.unique(np.concatenate([w, [0.0]]))
    # drop points that sit on a boundary pole (the response is infinite there)
    axis_w = np.array(sorted({ar.w for ar in axis if 0.0 < ar.w < wnyq}))
    if axis_w.size:
        near = np.min(np.abs(w[:, None] - axis_w[None, :]), axis=1) <= 1e-9 * np.maximum(axis_w.max(), 1e-300)
        keep = ~near
        w = w[keep]
    w = _thin(w)
    return _refine_adaptively(evaluate, w, nvar, axis_w, phase_step=phase_step,
                              passes=refine_passes, max_points=max_points)


def _resonance_windows(wd: np.ndarray, width: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Points across ``wd +- 10 width`` of every resonance, spaced ``width / 2`` (``t``: the
    41 offsets -10 .. 10 in units of ``width``).  Windows that overlap (the same mode of close
    variants of one group) share one run of points at the smallest spacing among them instead
    of one run each, so a group's grid does not grow with its variants beyond the union of
    the windows; a window alone gets exactly its 41 points."""
    half = 10.0 * width
    lo, hi = wd - half, wd + half
    order = np.argsort(lo, kind="stable")
    lo, hi, width, wd = lo[order], hi[order], width[order], wd[order]
    # merged runs: a window starts a new run when it begins beyond every earlier end
    start = np.r_[True, lo[1:] > np.maximum.accumulate(hi)[:-1]]
    run = np.cumsum(start) - 1
    out = []
    for r in range(int(run[-1]) + 1):
        m = run == r
        if m.sum() == 1:
            k = int(np.flatnonzero(m)[0])
            out.append(width[k] * t + wd[k])
            continue
        a, b = float(lo[m].min()), float(hi[m].max())
        h = 0.5 * float(width[m].min())
        n = int(math.ceil((b - a) / h))
        if n + 1 >= t.size * int(m.sum()):       # no saving: every window's own points
            out.append((width[m][:, None] * t[None, :] + wd[m][:, None]).ravel())
        else:
            out.append(np.linspace(a, b, n + 1))
    return np.concatenate(out)


def _thin(w: np.ndarray, rel: float = 1e-12) -> np.ndarray:
    """Drop points closer than ``rel`` (relative) to their predecessor."""
    if w.size < 2:
        return w
    keep = np.ones(w.size, bool)
    keep[1:] = np.diff(w) > rel * np.maximum(w[1:], 1e-300)
    return w[keep]


def _extend_ends(evaluate, dt, poles, zeros, lo, hi, axis, nvar):
    """Push the grid ends out until any remaining unity crossing is inside (power-law asymptotes)."""
    h = np.abs(_call(evaluate, [lo, hi], nvar))
    at_origin = np.zeros(nvar, int)
    for ar in axis:
        if ar.w == 0.0:
            at_origin[ar.variant] += ar.order
    for ar in _axis_roots(zeros, dt, axis_tol=1e-9):
        if ar.w == 0.0:
            at_origin[ar.variant] -= ar.order
    rel_degree = [len(np.ravel(p)) - len(np.ravel(z)) for p, z in zip(poles, zeros)]
    for v in range(nvar):
        m = int(at_origin[v])
        a = h[v, 0]
        if np.isfinite(a) and a > 0 and m != 0:
            # |L| ~ c w^-m below every feature: the unity crossing is at lo * a^(1/m)
            target = 100.0 if m > 0 else 0.01
            if (m > 0 and a < target) or (m < 0 and a > target):
                lo = min(lo, lo * (a / target) ** (1.0 / m) / 2.0)
        if dt is None:
            r = rel_degree[v]
            b = h[v, 1]
            if r > 0 and np.isfinite(b) and b > 0.01:
                hi = max(hi, hi * (b / 0.01) ** (1.0 / r) * 2.0)
    return lo, hi


def _refine_adaptively(evaluate, w, nvar, axis_w, *, phase_step, passes, max_points):
    """Bisect intervals where any variant's phase turns more than ``phase_step`` rad or its
    magnitude changes by more than a factor e^phase_step (boundary-pole intervals, and the
    phase and magnitude change next to a non-finite value or an exact zero, excluded).

    Returns the grid and the values on it when the last pass evaluated exactly that grid
    (else ``None``)."""
    h = None
    raw = None
    for _ in range(passes):
        # values are pointwise: after the first pass only the new midpoints are evaluated,
        # and only the intervals next to them are checked again (the others were fine)
        if h is None:
            h = _call(evaluate, w, nvar)
            with np.errstate(divide="ignore", invalid="ignore"):
                lm = np.log(np.abs(h) + _TINY)          # log magnitude at every point
            J = None                                     # every interval
            raw = np.zeros(w.size - 1, bool)
        with np.errstate(divide="ignore", invalid="ignore"):
            if J is None:
                ha, hb, la, lb = h[:, :-1], h[:, 1:], lm[:, :-1], lm[:, 1:]
            else:
                ha, hb, la, lb = h[:, J], h[:, J + 1], lm[:, J], lm[:, J + 1]
            dph = np.abs(np.angle(hb / ha))
            dmag = np.abs(lb - la)
            # an exact zero at a grid point (S at w = 0 of a loop with an integrator) is like a
            # pole there: no bisection resolves its phase or log magnitude; non-finite steps
            # (at a pole) are left alone too
            ok = ~((ha == 0) | (hb == 0))
            step_bad = np.any(ok & (((dph > phase_step) & np.isfinite(dph))
                                    | ((dmag > phase_step) & np.isfinite(dmag))), axis=0)
        if J is None:
            raw |= step_bad
        else:
            raw[J] |= step_bad
        bad = raw.copy()
        if axis_w.size:
            for w0 in axis_w:
                i = np.searchsorted(w, w0)
                if 0 < i < w.size:
                    bad[i - 1] = False
        if not bad.any() or w.size + bad.sum() > max_points:
            return w, h
        mids = 0.5 * (w[:-1][bad] + w[1:][bad])
        wn = np.unique(np.concatenate([w, mids]))
        fresh = ~np.isin(wn, w, assume_unique=True)
        hn = np.empty((nvar, wn.size), complex)
        hn[:, ~fresh] = h
        hn[:, fresh] = _call(evaluate, wn[fresh], nvar)
        lmn = np.empty((nvar, wn.size))
        lmn[:, ~fresh] = lm
        with np.errstate(divide="ignore", invalid="ignore"):
            lmn[:, fresh] = np.log(np.abs(hn[:, fresh]) + _TINY)
        # intervals between two old points keep their old verdict (a bad one whose midpoint
        # coincided with an end is checked again)
        old_left = np.searchsorted(w, wn[:-1])
        both_old = ~fresh[:-1] & ~fresh[1:]
        rawn = np.zeros(wn.size - 1, bool)
        rawn[both_old] = raw[np.minimum(old_left[both_old], raw.size - 1)]
        J = np.flatnonzero(~both_old | rawn)
        rawn[J] = False
        w, h, lm, raw = wn, hn, lmn, rawn
    return w, None


def frequency_grid(fb: FreqBatch, *, points_per_decade: int = 40, w_min: float | None = None,
                   w_max: float | None = None, resonance_zeta: float = 0.3,
                   phase_step: float = 0.35, axis_tol: float = 1e-9, max_points: int = 200_000,
                   refine_passes: int = 6) -> np.ndarray:
    """Frequency grid (rad/s) on which every variant of the loop is sampled.

    The rule:

    * a logarithmic grid with ``points_per_decade`` points from ``w_min`` to ``w_max``; by
      default two decades below the slowest and above the fastest nonzero pole/zero magnitude
      (continuous; discrete poles and zeros are mapped by ``log(z)/dt``), or up to ``pi/dt``
      (discrete, which also gets a uniform grid over ``[0, pi/dt]``);
    * then the ends are pushed out until the loop gain's power-law asymptotes can no longer
      cross unity outside the grid (``|L| >= 100`` at the low end of an integrating loop,
      ``|L| <= 0.01`` at the high end of a strictly proper one);
    * ``w = 0`` always (a variant with a pole there is infinite at that point, and its first
      interval is then handled as the small indentation round the pole);
    * 41 points across ``+-10 zeta wn`` of every pole or zero with damping below
      ``resonance_zeta`` (overlapping windows of several variants share one run of points at
      the smallest of their spacings ``zeta wn / 2``) plus geometric points approaching its
      damped frequency, relative offsets 1e-1 down to 1e-6 but not below ``|zeta| / 100``;
    * geometric points approaching every pole on the imaginary axis (unit circle) from both
      sides, the pole frequency itself excluded;
    * for loops with a delay (estimated by :func:`estimate_delay`), a uniform grid whose delay
      phase step is ``phase_step`` rad;
    * finally up to ``refine_passes`` bisection passes wherever the phase of some variant turns
      more than ``phase_step`` rad (or its magnitude changes by more than that in log units)
      between neighbours, within ``max_points`` points.

    Parameters
    ----------
    fb : FreqBatch
        The loop gains.
    points_per_decade : int
        Density of the logarithmic part.
    w_min, w_max : float, optional
        Explicit range in rad/s (no automatic end extension when given).
    resonance_zeta : float
        Damping ratio below which a pole or zero is densified.
    phase_step : float
        Largest accepted phase step between neighbours, rad.
    axis_tol : float
        Relative distance from the imaginary axis (unit circle) under which a pole counts as on it.
    max_points, refine_passes : int
        Limits of the adaptive refinement.

    Returns
    -------
    ndarray
        Sorted, unique frequencies in rad/s (read-only; with default arguments the grid is
        computed once per :class:`FreqBatch` and reused).
    """
    defaults = (points_per_decade, w_min, w_max, resonance_zeta, phase_step, axis_tol,
                max_points, refine_passes) == (40, None, None, 0.3, 0.35, 1e-9, 200_000, 6)
    memo = _memo(fb) if defaults else {}
    if "grid" in memo:
        return memo["grid"]
    delay = estimate_delay(fb) if fb.dt is None else None
    w, h = _grid(fb.evaluate, fb.dt, fb.poles, fb.zeros, points_per_decade=points_per_decade,
                 w_min=w_min, w_max=w_max, resonance_zeta=resonance_zeta, delay=delay,
                 axis_tol=axis_tol, max_points=max_points, phase_step=phase_step,
                 refine_passes=refine_passes, extend_for_loop=True)
    w.flags.writeable = False
    if defaults:
        memo["grid"] = w
        if h is not None:
            memo["grid_values"] = h
    return w


# ----------------------------------------------------------------------------------------------
# crossings
# ----------------------------------------------------------------------------------------------

def _pole_interval_mask(w: np.ndarray, axis: list[_AxisRoot], nvar: int) -> np.ndarray:
    """(V, len(w)-1) True where the interval contains a boundary pole of that variant."""
    mask = np.zeros((nvar, max(w.size - 1, 0)), bool)
    for ar in axis:
        i = int(np.searchsorted(w, ar.w))
        if ar.w == 0.0:
            mask[ar.variant, 0] = True
        elif 0 < i < w.size:
            mask[ar.variant, i - 1] = True
        elif i >= w.size and w.size > 1:
            mask[ar.variant, -1] = True
    return mask


def _roots_on_grid(G: np.ndarray, fun, w: np.ndarray, mask: np.ndarray, *, xrtol: float,
                   interior: slice) -> list[np.ndarray]:
    """Per variant, roots of a real function from its sign changes on the grid, refined for all
    variants at once by :func:`_vsolve`.  ``G`` (V, n) holds the function on the grid."""
    nvar = G.shape[0]
    idx = np.arange(w.size)[interior]
    if idx.size < 2:
        return [np.empty(0) for _ in range(nvar)]
    lo, hi = int(idx[0]), int(idx[-1])
    ga, gb = G[:, lo:hi], G[:, lo + 1:hi + 1]
    fin = np.isfinite(ga) & np.isfinite(gb) & ~mask[:, lo:hi]
    v, i = np.nonzero(fin & (ga * gb < 0))
    i = i + lo
    r = _vsolve(fun, v, w[i], w[i + 1], G[v, i], G[v, i + 1], xrtol=xrtol)
    v0, i0 = np.nonzero(fin & (ga == 0))
    keep = i0 > 0
    v0, i0 = v0[keep], i0[keep] + lo
    allv = np.concatenate([v, v0])
    allr = np.concatenate([r, w[i0]])
    # per variant: sorted distinct roots (np.unique of each variant's roots, all at once)
    order = np.lexsort((allr, allv))
    allv, allr = allv[order], allr[order]
    new = np.ones(allv.size, bool)
    new[1:] = (allv[1:] != allv[:-1]) | (allr[1:] != allr[:-1])
    allv, allr = allv[new], allr[new]
    return _split_by_variant(allr, allv, nvar)


def _split_by_variant(values: np.ndarray, vi: np.ndarray, nvar: int) -> list[np.ndarray]:
    """``[values[vi == v] for v in range(nvar)]`` for a non-decreasing ``vi``."""
    counts = np.bincount(np.asarray(vi, int), minlength=nvar)
    return [a.copy() for a in np.split(values, np.cumsum(counts)[:-1])]


def _crossing_setup(fb: FreqBatch, grid):
    """Grid, boundary-pole mask, L on the grid and the pairwise sampler of L (memoised for the
    default grid)."""
    memo = _memo(fb)
    default = frequency_grid(fb)
    if grid is None or grid is default:
        if "setup" in memo:
            return memo["setup"]
        grid = default
    w = np.asarray(grid, float)
    axis = _axis_roots(fb.poles, fb.dt, axis_tol=1e-9)
    mask = _pole_interval_mask(w, axis, fb.nvar)
    L = memo.get("grid_values") if w is default else None
    if L is None:
        L = _call(fb.evaluate, w, fb.nvar)
    tau = estimate_delay(fb) if fb.dt is None else None
    smp = _Sampler(fb.evaluate, fb.dt, fb.poles, fb.zeros, w, L, tau=tau)
    out = (w, mask, L, smp)
    if w is default:
        memo["setup"] = out
    return out


def loop_pairwise(fb: FreqBatch, kind: str = "L"):
    """Fast pairwise evaluator of a loop function, for ``peak_gain(..., pairwise=...)``.

    Parameters
    ----------
    fb : FreqBatch
        The loop gains.
    kind : {"L", "S", "T", "S-1/2"}
        ``L``, ``S = 1/(1+L)``, ``T = L/(1+L)`` or ``S - 1/2 = (1-L)/(2(1+L))``.

    Returns
    -------
    callable
        ``at(vi, w) -> complex (K,)``: the function of variant ``vi[k]`` at ``w[k]`` rad/s,
        from the verified rational-and-delay model of L (see ``_Sampler``) where it holds, else
        from ``fb.evaluate``.  At a pole of L the limits (S = 0, T = 1, S - 1/2 = -1/2) are used.
    """
    if kind not in ("L", "S", "T", "S-1/2"):
        raise ValueError(f"unknown loop function {kind!r}; use 'L', 'S', 'T' or 'S-1/2'")
    smp = _crossing_setup(fb, None)[3]

    def at(vi, x):
        lv = smp.at(vi, x)
        if kind == "L":
            return lv
        fin = np.isfinite(lv)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            if kind == "S":
                return np.where(fin, 1.0 / (1.0 + lv), 0.0)
            if kind == "T":
                return np.where(fin, lv / (1.0 + lv), 1.0)
            return np.where(fin, (1.0 - lv) / (2.0 * (1.0 + lv)), -0.5)
    return at


def _gain_crossings(smp, w, mask, L, xrtol):
    with np.errstate(divide="ignore"):
        g = np.log(np.abs(L) + _TINY)
    start = 1 if w[0] == 0.0 else 0
    return _roots_on_grid(g, lambda vi, x: np.log(np.abs(smp.at(vi, x)) + _TINY), w, mask,
                          xrtol=xrtol, interior=slice(start, None))


def gain_crossovers(fb: FreqBatch, *, grid: np.ndarray | None = None,
                    xrtol: float = 1e-14) -> list[np.ndarray]:
    """Every frequency w > 0 with |L(jw)| = 1, per variant (rad/s).

    Sign changes of ``ln|L|`` on the grid (:func:`frequency_grid` unless ``grid`` is given) are
    refined by bracketed root finding (Illinois false position with bisection safeguard) to
    relative tolerance ``xrtol``.  Intervals holding a pole on the imaginary axis (unit circle)
    are skipped.
    """
    w, mask, L, smp = _crossing_setup(fb, grid)
    return _gain_crossings(smp, w, mask, L, xrtol)


def _phase_crossings_all(smp, dt, w, mask, L, xrtol) -> list[np.ndarray]:
    """All w > 0 (below pi/dt) with Im L = 0, whatever the sign of Re L."""
    with np.errstate(divide="ignore", invalid="ignore"):
        g = L.imag / (np.abs(L) + _TINY)

    def fun(vi, x):
        val = smp.at(vi, x)
        return val.imag / (np.abs(val) + _TINY)

    start = 1 if w[0] == 0.0 else 0
    stop = w.size - 1 if (dt is not None and w[-1] >= math.pi / dt * (1 - 1e-12)) else w.size
    return _roots_on_grid(g, fun, w, mask, xrtol=xrtol, interior=slice(start, stop))


def phase_crossovers(fb: FreqBatch, *, grid: np.ndarray | None = None,
                     xrtol: float = 1e-14) -> list[np.ndarray]:
    """Every phase crossover per variant (rad/s): L real and negative.

    Zeros of ``Im L / |L|`` with ``w > 0``, refined like :func:`gain_crossovers`, kept where
    ``Re L < 0``; plus ``w = 0`` when L(0) is finite and negative; plus ``pi/dt`` for a
    discrete loop when ``L(-1) < 0``.
    """
    w, mask, L, smp = _crossing_setup(fb, grid)
    return _phase_crossovers_from(fb, smp, w, mask, L, xrtol)


def _phase_crossovers_from(fb, smp, w, mask, L, xrtol):
    allc = _phase_crossings_all(smp, fb.dt, w, mask, L, xrtol)
    vi = np.concatenate([np.full(c.size, v) for v, c in enumerate(allc)] + [np.empty(0, int)])
    vals = smp.at(vi.astype(int), np.concatenate(allc + [np.empty(0)]))
    end = _call(fb.evaluate, [0.0] + ([math.pi / fb.dt] if fb.dt is not None else []), fb.nvar)
    out = []
    per = _split_by_variant(vals, vi.astype(int), fb.nvar)
    for v, c in enumerate(allc):
        lv = per[v]
        keep = list(c[(lv.real < 0) & (np.abs(lv) > _TINY)])
        l0 = end[v, 0]
        if np.isfinite(l0) and l0.real < 0:
            keep.insert(0, 0.0)
        if fb.dt is not None:
            ln = end[v, 1]
            if np.isfinite(ln) and ln.real < 0:
                keep.append(math.pi / fb.dt)
        out.append(np.array(keep, float))
    return out


# ----------------------------------------------------------------------------------------------
# peaks and bandwidth
# ----------------------------------------------------------------------------------------------

def _base_grid(evaluate, dt, poles, zeros, grid) -> tuple[np.ndarray, np.ndarray | None]:
    """Grid for a closed-loop function: the pole/zero-aware grid of :func:`frequency_grid`, or
    the given one; either way refined adaptively on this function.  Returns the grid and the
    values on it (``None`` when the refinement stopped at its pass limit).

    With a given (read-only) grid the result is memoised per evaluator and grid object, so
    the peak and the bandwidth of one function refine its grid once."""
    memo = None
    if grid is not None and isinstance(grid, np.ndarray) and not grid.flags.writeable:
        memo = _memo(evaluate)
        hit = memo.get("base")
        if hit is not None and hit[0] is grid:
            return hit[1], hit[2]
    if grid is None:
        w, h = _grid(evaluate, dt, poles, zeros, points_per_decade=40, w_min=None, w_max=None,
                     resonance_zeta=0.3, delay=None, axis_tol=1e-9, max_points=200_000,
                     phase_step=0.35, refine_passes=6, extend_for_loop=False)
        return w, h
    w = np.unique(np.concatenate([np.asarray(grid, float), [0.0]]))
    wnyq = math.pi / dt if dt is not None else math.inf
    axis_w = np.array(sorted({ar.w for ar in _axis_roots(poles, dt, axis_tol=1e-9)
                              if 0.0 < ar.w < wnyq}))
    w, h = _refine_adaptively(evaluate, w, len(poles), axis_w, phase_step=0.35, passes=6,
                              max_points=200_000)
    if memo is not None:
        memo["base"] = (grid, w, h)
    return w, h


def peak_gain(evaluate, dt, poles, zeros, *, w_range: tuple[float, float] = (0.0, math.inf),
              grid: np.ndarray | None = None, candidate_ratio: float = 0.5,
              xrtol: float = 1e-10, far_factor: float = 1e8, max_candidates: int = 50,
              pairwise=None) -> tuple[np.ndarray, np.ndarray]:
    """Supremum of |H(jw)| over ``w_range`` for a batch of transfer functions.

    Parameters
    ----------
    evaluate : callable
        ``evaluate(w) -> complex (V, len(w))``, same form as :attr:`FreqBatch.evaluate`.
    dt : float or None
        Sample time in s (discrete responses are searched up to ``pi/dt`` at most).
    poles, zeros : list of ndarray
        Poles and zeros of H per variant (s-plane or z-plane); they shape the grid.
    w_range : (float, float)
        Closed range in rad/s; the ends are always candidates.
    grid : ndarray, optional
        Base grid (rad/s) to use instead of the one built from ``poles`` and ``zeros``, e.g.
        the loop's :func:`frequency_grid` (cheaper; it is still refined adaptively wherever H
        turns or changes fast, which catches lightly damped closed-loop poles).
    candidate_ratio : float
        Every local grid maximum whose value is at least this fraction of the largest grid value
        is refined by golden-section search between its grid neighbours (at most
        ``max_candidates`` of them, the highest first; flat stretches, where both neighbours
        agree to 1e-12, are not refined).
    xrtol : float
        Relative frequency tolerance of that search (the peak value is then exact to about
        ``xrtol**2``).
    far_factor : float
        Continuous H with an unbounded range: the limit at infinite frequency is taken as
        ``|H|`` at ``far_factor`` times the grid end (exact to ``far_factor**-r`` for a
        rational H of relative degree r).
    pairwise : callable, optional
        ``pairwise(vi, w) -> complex (K,)``: H of variant ``vi[k]`` at ``w[k]``, for the
        refinement; by default the exact rational-and-delay model of H when it matches
        ``evaluate``, else ``evaluate`` itself (which costs V evaluations per point).

    Returns
    -------
    peak : ndarray (V,)
        sup |H| (plain ratio); ``inf`` when H has a pole on the axis inside the range.
    w_peak : ndarray (V,)
        Frequency of the peak in rad/s; ``inf`` when the supremum is the high-frequency limit.
    """
    nvar = len(poles)
    lo, hi = float(w_range[0]), float(w_range[1])
    if dt is not None:
        hi = min(hi, math.pi / dt)
    if not (0.0 <= lo <= hi):
        raise ComputeError(f"frequency range {w_range} is empty; give 0 <= low <= high")
    wb, hb = _base_grid(evaluate, dt, poles, zeros, grid)
    if math.isfinite(hi):
        w = np.unique(np.concatenate([wb[(wb >= lo) & (wb <= hi)], [lo, hi]]))
    else:
        w = np.unique(np.concatenate([wb[wb >= lo], [lo]]))
    if hb is not None and w.size == wb.size and np.array_equal(w, wb):
        Hc = hb
    else:
        Hc = _call(evaluate, w, nvar)
    h = np.abs(Hc)
    peak = np.full(nvar, -math.inf)
    wpk = np.zeros(nvar)
    at_pole = np.zeros(nvar, bool)
    # poles on the axis inside the range: infinite peak, if |H| really grows there (a listed
    # pole may be cancelled, e.g. an open-loop integrator listed among the features of S)
    wref = float(w[w > 0][0]) if np.any(w > 0) else 1.0
    cands = [ar for ar in _axis_roots(poles, dt, axis_tol=1e-9) if lo <= ar.w <= hi]
    if cands:
        pts = []
        for ar in cands:
            d = max(ar.w, wref)
            side = -1.0 if (dt is not None and ar.w >= math.pi / dt * (1 - 1e-12)) else 1.0
            pts.append((ar.w + side * 1e-6 * d, ar.w + side * 1e-8 * d))
        pts = np.array(pts)
        uw, inv = np.unique(pts.ravel(), return_inverse=True)
        vals = np.abs(_call(evaluate, uw, nvar))
        for j, ar in enumerate(cands):
            near = vals[ar.variant, inv.reshape(-1, 2)[j]]
            if not np.all(np.isfinite(near)) or near[1] > 10.0 * near[0]:
                peak[ar.variant], wpk[ar.variant] = math.inf, ar.w
                at_pole[ar.variant] = True
    # grid maxima; points where the evaluator gave no finite value (0/0 of an integrator at
    # w = 0, say) are left out
    hm = np.where(np.isfinite(h), h, -math.inf)
    top = np.max(hm, axis=1)
    nofin = ~np.isfinite(top) & ~at_pole
    if nofin.any():
        v = int(np.flatnonzero(nofin)[0])
        raise ComputeError(f"variant {v}: the response is not finite at any grid frequency; "
                           "check the evaluator")
    sel = np.isfinite(top) & ~at_pole
    kmax = np.argmax(hm, axis=1)
    peak[sel], wpk[sel] = top[sel], w[kmax[sel]]
    left = np.concatenate([np.full((nvar, 1), -math.inf), hm[:, :-1]], axis=1)
    right = np.concatenate([hm[:, 1:], np.full((nvar, 1), -math.inf)], axis=1)
    with np.errstate(invalid="ignore"):
        flat = (np.abs(left - hm) <= 1e-12 * hm) & (np.abs(right - hm) <= 1e-12 * hm)
    cand = ((hm >= left) & (hm >= right) & (hm >= candidate_ratio * top[:, None]) & ~flat
            & np.isfinite(hm) & ~at_pole[:, None])
    # per variant, its candidates by decreasing grid value (ties by frequency), at most
    # max_candidates of them
    vs, ks = np.nonzero(cand)
    order = np.lexsort((ks, -hm[vs, ks], vs))
    vs, ks = vs[order], ks[order]
    first = np.searchsorted(vs, vs, side="left")
    keep = np.arange(vs.size) - first < max_candidates
    vs, ks = vs[keep], ks[keep]
    if vs.size:
        vi, k = vs, ks
        a, b = w[np.maximum(k - 1, 0)], w[np.minimum(k + 1, w.size - 1)]
        at = pairwise if pairwise is not None else _Sampler(evaluate, dt, poles, zeros, w, Hc).at

        def fun(vv, x):
            val = np.abs(at(vv, x))
            return np.where(np.isfinite(val), val, -math.inf)

        x, f = _vmaximize(fun, vi, a, b, xrtol=xrtol)
        # the largest refined value of each variant (the first one on ties) where it beats
        # the grid maximum
        fv = np.where(np.isfinite(f), f, -math.inf)
        best = np.full(nvar, -math.inf)
        np.maximum.at(best, vi, fv)
        j = np.flatnonzero(fv == best[vi])
        uv, jf = np.unique(vi[j], return_index=True)
        jbest = j[jf]
        win = best[uv] > peak[uv]
        peak[uv[win]], wpk[uv[win]] = best[uv[win]], x[jbest[win]]
    if dt is None and not math.isfinite(hi):
        # the supremum may be the limit at infinite frequency (biproper H): compare with a
        # value far beyond every feature and report w_peak = inf when it wins
        far = _call(evaluate, [far_factor * float(w[-1])], nvar)[:, 0]
        af = np.abs(far)
        with np.errstate(invalid="ignore"):
            win = np.isfinite(peak) & np.isfinite(far) & (af > peak)
        peak[win], wpk[win] = af[win], math.inf
    return peak, wpk


def bandwidth(evaluate_T, dt, poles, zeros, *, drop_db: float = 3.0, grid: np.ndarray | None = None,
              xrtol: float = 1e-14, pairwise=None) -> np.ndarray:
    """Closed-loop bandwidth: first w where |T| falls to ``10^(-drop_db/20) |T(0)|`` (rad/s).

    ``grid`` and ``pairwise`` work as in :func:`peak_gain`; ``drop_db`` is the level in dB
    (3 by default, exactly ``10^(-3/20)``).  If the evaluator gives NaN at ``w = 0`` (0/0),
    ``|T(0)|`` is taken at ``1e-9`` times the first positive grid frequency.

    The absolute DC gain is used (a negative DC gain is fine).  The first grid point below the
    level brackets the crossing, which is refined by bracketed root finding on ``ln|T|``.

    Returns
    -------
    ndarray (V,)
        Bandwidth in rad/s; ``inf`` when |T| stays above the level over the whole grid (for
        discrete loops: up to ``pi/dt``; continuous: up to the grid end, two decades beyond the
        fastest pole or zero).

    Raises
    ------
    ComputeError
        When ``|T(0)|`` is zero or not finite.
    """
    nvar = len(poles)
    wb, hb = _base_grid(evaluate_T, dt, poles, zeros, grid)
    w = wb[wb <= math.pi / dt] if dt is not None else wb
    Tc = hb if (hb is not None and w.size == wb.size) else _call(evaluate_T, w, nvar)
    h = np.abs(Tc)
    out = np.full(nvar, math.inf)
    t0 = h[:, 0].copy()
    if np.any(np.isnan(t0)) and w.size > 1:
        # 0/0 at w = 0 (e.g. L/(1+L) formed from an infinite L): take the limit from w > 0
        near = np.abs(_call(evaluate_T, [1e-9 * w[1]], nvar))[:, 0]
        t0 = np.where(np.isnan(t0), near, t0)
        h[:, 0] = t0
    for v in range(nvar):
        if not np.isfinite(t0[v]) or t0[v] == 0.0:
            raise ComputeError(f"bandwidth needs a finite nonzero DC gain; variant {v} has "
                               f"|T(0)| = {t0[v]}; check the loop (integrators, zeros at 0)")
    level = np.log(t0) - drop_db / 20.0 * math.log(10.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        below = np.log(h + _TINY) < level[:, None]
    has = below.any(axis=1)
    vi = np.flatnonzero(has)
    if vi.size:
        i = np.argmax(below[vi], axis=1)
        at = pairwise if pairwise is not None else _Sampler(evaluate_T, dt, poles, zeros, w, Tc).at

        def fun(vv, x):
            return np.log(np.abs(at(vv, x)) + _TINY) - level[vv]

        a, b = w[i - 1], w[i]
        fa = np.log(h[vi, i - 1] + _TINY) - level[vi]
        fb = np.log(h[vi, i] + _TINY) - level[vi]
        out[vi] = _vsolve(fun, vi, a, b, fa, fb, xrtol=xrtol)
    return out


_MARGIN_NAMES = frozenset({"DiskMargin", "Margins", "closed_loop_unstable_count", "disk_margin",
                           "encirclements", "margins"})


def __getattr__(name):
    """Re-export the margin functions of :mod:`ledger.engine.margins` (imported on first use)."""
    if name in _MARGIN_NAMES:
        from ledger.engine import margins as _m
        return getattr(_m, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
