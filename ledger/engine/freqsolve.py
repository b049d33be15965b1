"""Batched exact evaluation at one frequency per (variant, point) pair, and the vectorised
root finding and maximisation that refine every crossing and peak off the grid."""

from __future__ import annotations

import math

import numpy as np

from ledger.errors import ComputeError
from ledger.engine.freqeval import _call, _estimate_delay, _pad

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

    def dlog(self, vi, w) -> np.ndarray:
        """``d ln H / dw`` of variant ``vi[k]`` at ``w[k]`` from its poles, zeros and delay
        (complex; its real part is ``d ln|H| / dw``); NaN for variants without a verified
        model."""
        vi = np.asarray(vi, int)
        w = np.asarray(w, float)
        out = np.full(w.size, np.nan + 0j)
        m = self.ok[vi]
        if not m.any():
            return out
        v, ww = vi[m], w[m]
        x = (1j * ww if self.dt is None else np.exp(1j * ww * self.dt))[:, None]
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            r = (np.sum(np.where(self.Zq[v], 1.0 / (x - self.Zp[v]), 0.0), axis=1)
                 - np.sum(np.where(self.Pq[v], 1.0 / (x - self.Pp[v]), 0.0), axis=1))
            if self.dt is None:
                out[m] = 1j * r - 1j * self.tau[v]
            else:
                out[m] = 1j * self.dt * x[:, 0] * r
        return out

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

    False position with the Anderson-Bjorck scaling of a retained end (bisection where the
    secant point leaves the bracket, and for every step after the 40th); stops when the bracket is narrower than ``xrtol * b`` or the
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
        # (with end values of opposite signs the secant point lies in the bracket: only
        # rounding puts it on an end)
        bis = (it >= 40) | ~np.isfinite(c)
        c = np.where(bis, 0.5 * (A + B), c)
        # a point closer than the tolerance to an end moves to that distance from it: once
        # false position has reached the root from one side, the next value then closes the
        # bracket from the other side, instead of that end creeping in step by step
        tol = 0.45 * xrtol * B
        c = np.where(B - A > 2.0 * tol, np.clip(c, A + tol, B - tol), 0.5 * (A + B))
        fc = np.asarray(fun(vi[active], c), float)
        if not np.all(np.isfinite(fc)):
            k = int(np.flatnonzero(~np.isfinite(fc))[0])
            raise ComputeError(f"crossing refinement met a non-finite value at {c[k]:.6g} rad/s "
                               f"(variant {vi[active][k]}); check the loop near that frequency")
        left = np.sign(fc) == np.sign(FA)          # root lies in [c, B]
        s = side[active]
        # an end kept twice in a row has its value scaled by m = 1 - f(c)/f(replaced end)
        # (Anderson-Bjorck; 1/2 when m <= 0), so that a curved function cannot hold one end
        # fixed while the other creeps towards the root
        with np.errstate(divide="ignore", invalid="ignore"):
            m = 1.0 - fc / np.where(left, FA, FB)
        m = np.where(np.isfinite(m) & (m > 0), m, 0.5)
        na, nfa = np.where(left, c, A), np.where(left, fc, FA)
        nb, nfb = np.where(left, B, c), np.where(left, FB, fc)
        nfb = np.where(left & (s == -1), nfb * m, nfb)
        nfa = np.where(~left & (s == 1), nfa * m, nfa)
        side[active] = np.where(left, -1, 1)
        a[active], fa[active], b[active], fb[active] = na, nfa, nb, nfb
        root[active] = c
        done = (fc == 0) | (nb - na <= xrtol * nb)
        root[active[~done]] = 0.5 * (na + nb)[~done]
        active = active[~done]
    return root


def _vmaximize(fun, vi, a, b, *, xrtol: float, maxiter: int = 300,
               slope=None) -> tuple[np.ndarray, np.ndarray]:
    """Maximum of ``fun(vi, x)`` on every ``[a, b]`` at once.

    With ``slope(vi, x)`` (the derivative of ``fun`` or of an increasing function of it, NaN
    where unknown), brackets whose ends have slopes of opposite sign (+ then -) are solved as
    the root of the slope (Illinois false position, superlinear); the others, and all of them
    without ``slope``, by golden-section search.  Both stop at the relative frequency width
    ``xrtol``."""
    a, b = np.array(a, float), np.array(b, float)
    vi = np.asarray(vi, int)
    if slope is None or a.size == 0:
        return _golden(fun, vi, a, b, xrtol=xrtol, maxiter=maxiter)
    with np.errstate(invalid="ignore"):
        sa, sb = np.asarray(slope(vi, a), float), np.asarray(slope(vi, b), float)
        root = np.isfinite(sa) & np.isfinite(sb) & (sa > 0) & (sb < 0)
    x = np.empty(a.size)
    f = np.empty(a.size)
    if root.any():
        r = np.flatnonzero(root)
        try:
            x[r] = _vsolve(slope, vi[r], a[r], b[r], sa[r], sb[r], xrtol=xrtol)
        except ComputeError:
            root[:] = False
        else:
            f[r] = fun(vi[r], x[r])
            # the root of the slope is the maximum only if it beats both bracket ends
            fa, fb = fun(vi[r], a[r]), fun(vi[r], b[r])
            bad = ~(np.isfinite(f[r]) & (f[r] >= fa) & (f[r] >= fb))
            root[r[bad]] = False
    rest = np.flatnonzero(~root)
    if rest.size:
        x[rest], f[rest] = _golden(fun, vi[rest], a[rest], b[rest], xrtol=xrtol,
                                   maxiter=maxiter)
    return x, f


def _golden(fun, vi, a, b, *, xrtol: float, maxiter: int = 300) -> tuple[np.ndarray, np.ndarray]:
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
