"""Peaks and bandwidth of closed-loop frequency responses, exact (no value read off a grid).

``peak_gain`` finds the supremum of |H| over a band by golden-section search from grid
candidates (vectorised over all variants, :mod:`~ledger.engine.freqsolve`); ``bandwidth``
finds the first frequency where |T| drops a given number of dB below its low-frequency
value by bracketed root finding.  Both are re-exported by :mod:`ledger.engine.freqresp`;
:mod:`ledger.engine.margins` uses ``peak_gain`` for the disk margin.
"""

from __future__ import annotations

import math

import numpy as np

from ledger.errors import ComputeError
from ledger.engine.freqeval import _TINY, _axis_roots, _call, _memo
from ledger.engine.freqgrid import _grid, _refine_adaptively
from ledger.engine.freqsolve import _Sampler, _vmaximize, _vsolve

__all__ = ["peak_gain", "bandwidth"]


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

        # the slope of ln|H| where the evaluator knows it (rational-and-delay models)
        dlog = getattr(at, "dlog", None) or getattr(getattr(at, "__self__", None), "dlog", None)
        slope = None if dlog is None else (lambda vv, x: np.real(dlog(vv, x)))
        if slope is not None:
            # a grid maximum between two slopes of one sign that beats its higher neighbour
            # only by rounding (a plateau, e.g. |S| -> 1 at high frequency) is no peak: the
            # function is monotone there and its grid value stands
            with np.errstate(invalid="ignore"):
                sa, sb = slope(vi, a), slope(vi, b)
                hk = hm[vi, k]
                hn = np.maximum(hm[vi, np.maximum(k - 1, 0)], hm[vi, np.minimum(k + 1, w.size - 1)])
                mono = (np.isfinite(sa) & np.isfinite(sb) & (sa * sb > 0)
                        & (hk - hn <= 1e-9 * np.abs(hk)))
            vi, a, b = vi[~mono], a[~mono], b[~mono]
        x, f = _vmaximize(fun, vi, a, b, xrtol=xrtol, slope=slope)
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
