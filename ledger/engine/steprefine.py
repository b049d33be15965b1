"""Refinement of step responses between samples: extrema and level crossings, exact.

On each step of a simulated response (:class:`~ledger.engine.simulation.Pieces`) the output
is ``y(t_k + s) = Cy expm(M s) Z_k``; every extremum (sign change of ``y'`` over a step) and
every level crossing is refined on that exact expression by a bracketed Newton iteration
(quadratic convergence, bisection safeguard), vectorised over all problems at once
(:class:`_Problems`, :func:`_solve`); :func:`_refine` adds the refined points to the pieces.
The step metrics that read them are in :mod:`ledger.engine.timeresp`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from ledger.engine.simulation import Pieces
from ledger.engine.ssbatch import expm_batch
from ledger.errors import ComputeError

__all__: list[str] = []


def _refine(p: Pieces, levels=(), near_extremes: bool | str = True,
            margin: float = 1e-2) -> None:
    """Refine, in place, the estimated extrema that can change a metric.

    An estimate is refined when it lies within ``margin`` (fraction of the largest ``|y|`` of
    its variant) of a decision level in ``levels`` (each an ndarray (V,), output units) or of
    the largest or smallest value of that variant; with ``near_extremes="abs"`` only of the
    largest ``|y|`` (the estimates that can be ``sup |y|``: a subset of the former, so the
    supremum is the same number, with fewer problems to solve).  The cubic-Hermite estimate errs by about
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
            if near_extremes == "abs":
                sup = np.maximum(np.abs(hi), np.abs(lo))[:, None]
                near |= np.abs(p.ye) >= sup - tol
            else:
                near |= (p.ye >= hi[:, None] - tol) | (p.ye <= lo[:, None] + tol)
    vi, ki = np.nonzero(todo & near)
    if vi.size == 0:
        return
    h = np.diff(p.t)[ki]
    P = _Problems(p.M, p.Cy, p.Z0, vi, ki)
    s, val = _solve(P, np.zeros(vi.size), h, p.da[vi, ki], p.db[vi, ki], 0.0, order=1,
                    s0=p.te[vi, ki] - p.t[ki])
    p.te[vi, ki] = p.t[ki] + s
    p.ye[vi, ki] = val
    p.exact[vi, ki] = True


#: Taylor degree of the in-step series and the largest ``||M||_1 s`` it is used for: the
#: remainder is below ``rho^(K+1) / (K+1)! * e^rho`` = 1.6e-17 at ``rho = 2``, K = 24
_TAYLOR_DEGREE = 24
_TAYLOR_RHO = 2.0
#: largest eigenvector condition number ``||V||_F ||V^-1||_F`` for which points beyond the
#: series' reach are evaluated from the modal form instead of a matrix exponential
_MODAL_KAPPA = 1e4


@dataclass(frozen=True)
class _Problems:
    """Refinement problems ``(variant v, step k)``: ``y(t_k + s) = Cy expm(M s) Z0[k]``.

    Inside a step ``s`` is small against the fastest mode, so ``y`` and its derivatives are
    evaluated from the Taylor series ``y^(j)(s) = sum_i Cy M^(i+j) Z0 s^i / i!``: the scalar
    moments ``Cy M^i Z0`` of each problem are made once (a few matrix-vector products) and
    every Newton step is then a polynomial evaluation instead of a matrix exponential.  The
    series is used where ``||M||_1 s <= 2`` (remainder below 1.6e-17 of ``|Cy| |Z0|``);
    elsewhere the modal sum ``sum_i (Cy v_i) c_i exp(lam_i s)`` (``c = V^-1 Z0``) where the
    variant's eigenvectors are well conditioned (:attr:`_modal`), else the matrix
    exponential.  The rounding scales are the sums of the magnitudes of the terms, so the
    noise test of :func:`_solve` stays honest either way.
    """

    M: np.ndarray
    Cy: np.ndarray
    Z0: np.ndarray
    v: np.ndarray
    k: np.ndarray

    @cached_property
    def _series(self):
        """(coefficients (5, P, K+1) in powers of s of y, y', y'' and of the rounding
        scales of y and y'; ||M||_1 per problem)."""
        K = _TAYLOR_DEGREE
        Mv = self.M[self.v]
        aM = np.abs(Mv)
        z = self.Z0[self.v, self.k]
        az = np.abs(z)
        Cy = self.Cy[self.v]
        aC = np.abs(Cy)
        mom = np.empty((self.v.size, K + 3))
        amom = np.empty((self.v.size, K + 2))
        with np.errstate(over="ignore", invalid="ignore"):
            self._moments(Mv, aM, z, az, Cy, aC, mom, amom)
        fact = np.array([math.factorial(i) for i in range(K + 1)], dtype=float)
        coef = np.stack([mom[:, j:j + K + 1] / fact for j in range(3)]
                        + [amom[:, j:j + K + 1] / fact for j in range(2)])
        norm = np.max(np.sum(aM, axis=-2), axis=-1) if self.v.size else np.zeros(0)
        # moments that overflowed (a very stiff M) leave the problem to the matrix exponential
        norm = np.where(np.all(np.isfinite(mom), axis=1) & np.all(np.isfinite(amom), axis=1),
                        norm, np.inf)
        return coef, norm

    @staticmethod
    def _moments(Mv, aM, z, az, Cy, aC, mom, amom):
        for i in range(mom.shape[1]):
            mom[:, i] = np.einsum("pa,pa->p", Cy, z)
            if i < amom.shape[1]:
                amom[:, i] = np.einsum("pa,pa->p", aC, az)
                az = np.einsum("pab,pb->pa", aM, az)
            z = np.einsum("pab,pb->pa", Mv, z)

    def values(self, idx: np.ndarray, s: np.ndarray, *, with_scale: bool = False):
        """y, y', y'' at ``t_k + s`` for the problems ``idx``; with ``with_scale`` also the
        sums of the magnitudes of the terms of y and y' (their rounding scale)."""
        idx = np.asarray(idx, dtype=int)
        s = np.asarray(s, dtype=float)
        coef, norm = self._series
        series = norm[idx] * np.abs(s) <= _TAYLOR_RHO
        outs = [np.empty(idx.size) for _ in range(5)]
        if series.any():
            j, sj = idx[series], s[series]
            pw = sj[:, None] ** np.arange(coef.shape[2])
            vals = np.einsum("qpk,pk->qp", coef[:, j], pw)
            for q in range(5):
                outs[q][series] = vals[q]
        if (~series).any():
            for q, val in enumerate(self._expm_values(idx[~series], s[~series])):
                outs[q][~series] = val
        y, d1, d2, sy, sd = outs
        if not with_scale:
            return y, d1, d2
        return y, d1, d2, (sy, sd)

    @cached_property
    def _modal(self):
        """Eigen-decomposition ``M = V diag(lam) V^-1`` of each problem's variant, for the
        points beyond the series' reach: ``(lam (P, m), |Cy| |V| (P, m), Cy V (P, m),
        c = V^-1 Z0 (P, m), trusted (P,))``.  A variant is trusted when
        ``||V||_F ||V^-1||_F <= _MODAL_KAPPA`` (rounding of the modal sum below about 1e4
        machine epsilons of its terms) and everything is finite; the others keep the matrix
        exponential."""
        u, inv = np.unique(self.v, return_inverse=True)
        Mu = self.M[u]
        with np.errstate(all="ignore"):
            lam, V = np.linalg.eig(Mu)
            try:
                W = np.linalg.inv(V)
            except np.linalg.LinAlgError:
                W = np.full_like(V, np.nan)
            kappa = np.linalg.norm(V, axis=(1, 2)) * np.linalg.norm(W, axis=(1, 2))
            Cy = self.Cy[u]
            CV = np.einsum("ua,uai->ui", Cy.astype(complex), V)
            aCV = np.einsum("ua,uai->ui", np.abs(Cy), np.abs(V))
            c = np.einsum("pij,pj->pi", W[inv], self.Z0[self.v, self.k].astype(complex))
        ok = (np.isfinite(kappa) & (kappa <= _MODAL_KAPPA)
              & np.all(np.isfinite(lam), axis=1) & np.all(np.isfinite(CV), axis=1))[inv]
        ok &= np.all(np.isfinite(c), axis=1)
        return lam[inv], aCV[inv], CV[inv], c, ok

    def _expm_values(self, idx, s):
        lam, aCV, CV, c, ok = self._modal
        outs = [np.empty(idx.size) for _ in range(5)]
        md = ok[idx]
        if md.any():
            j, sj = idx[md], s[md]
            with np.errstate(all="ignore"):
                e = c[j] * np.exp(lam[j] * sj[:, None])             # modal coordinates at s
                t = CV[j] * e
                ae = np.abs(e) * aCV[j]
                outs[0][md] = np.sum(t, axis=1).real
                outs[1][md] = np.sum(lam[j] * t, axis=1).real
                outs[2][md] = np.sum(lam[j] ** 2 * t, axis=1).real
                outs[3][md] = np.sum(ae, axis=1)
                outs[4][md] = np.sum(np.abs(lam[j]) * ae, axis=1)
        if (~md).any():
            for q, val in enumerate(self._expm_direct(idx[~md], s[~md])):
                outs[q][~md] = val
        return outs

    def _expm_direct(self, idx, s):
        v, k = self.v[idx], self.k[idx]
        Mv = self.M[v]
        E = expm_batch(Mv * s[:, None, None])
        Z = np.einsum("pab,pb->pa", E, self.Z0[v, k])
        MZ = np.einsum("pab,pb->pa", Mv, Z)
        MMZ = np.einsum("pab,pb->pa", Mv, MZ)
        Cy = self.Cy[v]
        aC = np.abs(Cy)
        return (np.einsum("pa,pa->p", Cy, Z), np.einsum("pa,pa->p", Cy, MZ),
                np.einsum("pa,pa->p", Cy, MMZ), np.einsum("pa,pa->p", aC, np.abs(Z)),
                np.einsum("pa,pa->p", aC, np.abs(MZ)))


def _solve(P: _Problems, lo, hi, f_lo, f_hi, level, *, order: int, xtol: float = 1e-13,
           maxiter: int = 200, noise: float = 64 * np.finfo(float).eps, s0=None,
           want_value: bool = True):
    """Bracketed Newton for ``y^(order)(t_k + s) = level`` with ``s`` in ``[lo, hi]``.

    ``f_lo`` and ``f_hi`` are the function values minus ``level`` at the bracket ends and have
    opposite signs (or one is zero).  Newton steps are kept while they halve the bracket at
    least every two iterations, bisection otherwise, so the bracket shrinks to ``xtol`` of its
    width within ``2 * 45`` iterations whatever the rounding of ``f``.  A point where ``|f|``
    is below ``noise`` (relative, default 64 machine epsilons) times the sum of the magnitudes
    of the terms of ``f`` (plus ``|level|``) is a root: ``f`` is zero to rounding there, and
    further steps would only follow rounding noise.  ``s0`` (optional) is a first estimate
    inside the bracket (e.g. from the cubic Hermite interpolant); by default the secant of
    the bracket ends.  Returns ``(s, y(t_k + s))`` (``y`` is ``None`` without
    ``want_value``).
    """
    lo = np.array(lo, dtype=float)
    hi = np.array(hi, dtype=float)
    f_lo = np.array(f_lo, dtype=float)
    f_hi = np.array(f_hi, dtype=float)
    level = np.broadcast_to(np.asarray(level, dtype=float), lo.shape).copy()
    width = hi - lo
    den = f_lo - f_hi
    frac = np.where(den != 0, f_lo / np.where(den != 0, den, 1.0), 0.5)
    s = lo + np.clip(frac, 0.0, 1.0) * width
    if s0 is not None:
        s0 = np.asarray(s0, dtype=float)
        s = np.where(np.isfinite(s0) & (s0 > lo) & (s0 < hi), s0, s)
    s = np.where(f_lo == 0, lo, np.where(f_hi == 0, hi, s))
    sign_lo = np.sign(f_lo)
    active = np.nonzero((f_lo != 0) & (f_hi != 0))[0]
    tol = xtol * np.maximum(width, 1e-300)
    ref = width.copy()                   # bracket width two iterations ago
    for it in range(maxiter):
        if active.size == 0:
            break
        y, d1, d2, scales = P.values(active, s[active], with_scale=True)
        f = (y, d1)[order] - level[active]
        g = (d1, d2)[order]
        f = np.where(np.abs(f) <= noise * (scales[order] + np.abs(level[active])), 0.0, f)
        same = np.sign(f) == sign_lo[active]
        lo[active] = np.where(same, s[active], lo[active])
        hi[active] = np.where(same, hi[active], s[active])
        f_lo[active] = np.where(same, f, f_lo[active])
        f_hi[active] = np.where(same, f_hi[active], f)
        a, b, fa, fb = lo[active], hi[active], f_lo[active], f_hi[active]
        with np.errstate(divide="ignore", invalid="ignore"):
            newton = s[active] - f / g
            secant = a - fa * (b - a) / (fb - fa)
        # a step that leaves the bracket by no more than the tolerance (a root at a bracket
        # end, met from inside) lands on that end
        inside = (np.isfinite(newton) & (newton >= lo[active] - tol[active])
                  & (newton <= hi[active] + tol[active]))
        newton = np.clip(newton, lo[active], hi[active])
        # a Newton step inside the bracket and below the tolerance has converged, whatever
        # the bisection safeguard below would do with it
        converged = inside & (np.abs(newton - s[active]) <= tol[active])
        # a Newton step that leaves the bracket (overshoot past a root close to one end)
        # gives way to the secant of the bracket ends
        sec_ok = np.isfinite(secant) & (secant > a) & (secant < b)
        if it % 2 == 1:
            # steps that do not halve the bracket every two iterations (f at rounding
            # level, flat f) give way to a bisection, so the bracket always shrinks.
            wnow = b - a
            halved = wnow <= 0.5 * ref[active]
            inside &= halved
            sec_ok &= halved
            ref[active] = wnow
        new = np.where(inside | converged, newton,
                       np.where(sec_ok, secant, 0.5 * (a + b)))
        done = (np.abs(new - s[active]) <= tol[active]) | (f == 0) | \
               (hi[active] - lo[active] <= tol[active])
        s[active] = np.where(f == 0, s[active], new)
        active = active[~done]
    if active.size:
        raise ComputeError("refinement of a crossing or extremum did not converge in"
                           f" {maxiter} steps; report this system")
    if not want_value:
        return s, None
    val = P.values(np.arange(s.size), s)[0] if s.size else s
    return s, val
