"""Frequency-domain evaluation helpers: checked batch evaluation, the roots on the stability
boundary, the pure-delay estimate and padded root arrays (used by every frequency kernel of
:mod:`ledger.engine.freqresp`).

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
