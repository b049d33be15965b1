"""Exact frequency-domain kernels: grids, crossovers, peaks and bandwidth.

Every function works on a batch of ``V`` SISO responses at once (variant axis 0).  Grids are
evaluated for all variants in one call of the evaluator; crossings and peaks are then refined per
variant by scalar root finding (:func:`scipy.optimize.brentq`) or bounded local optimisation
(:func:`scipy.optimize.minimize_scalar`), so no reported number is read off a grid.

Margins, Nyquist encirclements and disk margins live in :mod:`ledger.engine.margins` and are
re-exported here.

Conventions: frequencies in rad/s, ``w >= 0``; continuous responses are evaluated at ``s = jw``,
discrete ones at ``z = exp(jw dt)`` for ``0 <= w <= pi/dt``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq, minimize_scalar

from ledger.errors import ComputeError
from ledger.engine.types import FreqBatch

__all__ = [
    "frequency_grid",
    "gain_crossovers",
    "phase_crossovers",
    "peak_gain",
    "bandwidth",
    "estimate_delay",
    "Margins",
    "DiskMargin",
    "margins",
    "encirclements",
    "closed_loop_unstable_count",
    "disk_margin",
]

_TINY = 1e-300


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


def _row(evaluate, w: float, v: int, nvar: int) -> complex:
    """Value of variant ``v`` at a single frequency ``w``."""
    return complex(_call(evaluate, [w], nvar)[v, 0])


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
    counts once.
    """
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
    ``K exp(-jw tau)`` with real ``K``.  Its phase is unwrapped along frequencies that double from
    ``w_start`` to ``w_stop`` while predicting the next value with the running slope, so delays
    up to about ``pi / w_start`` seconds are recovered.  Used only to set grid density.

    Returns
    -------
    ndarray (V,)
        Delay in seconds, >= 0 (0 for discrete loops, whose delays are poles at z = 0).
    """
    nvar = fb.nvar
    if fb.dt is not None:
        return np.zeros(nvar)
    feats = [np.abs(_s_equivalent(list(p) + list(z), None)) for p, z in zip(fb.poles, fb.zeros)]
    allf = np.concatenate([f[f > 0] for f in feats] + [np.array([1.0])])
    w0 = w_start if w_start is not None else 1e-6 * float(np.min(allf))
    w1 = w_stop if w_stop is not None else 1e3 * float(np.max(allf))
    k = max(2, int(math.ceil(math.log2(w1 / w0))) + 1)
    w = w0 * 2.0 ** np.arange(k)
    L = _call(fb.evaluate, w, nvar)
    s = 1j * w
    tau = np.zeros(nvar)
    for v in range(nvar):
        ph = np.angle(L[v])
        ph = ph + np.sum(np.angle(s[:, None] - np.asarray(fb.poles[v], complex)[None, :]), axis=1)
        ph = ph - np.sum(np.angle(s[:, None] - np.asarray(fb.zeros[v], complex)[None, :]), axis=1)
        if not np.all(np.isfinite(ph)):
            continue
        theta = ph[0]
        est = 0.0
        for i in range(1, k):
            pred = theta - (w[i] - w[i - 1]) * est
            theta = pred + (math.remainder(ph[i] - pred, 2 * math.pi))
            est = -(theta - ph[0]) / (w[i] - w[0])
        tau[v] = max(est, 0.0)
    return tau


def _grid(evaluate, dt, poles, zeros, *, points_per_decade: int, w_min, w_max,
          resonance_zeta: float, delay=None, axis_tol: float, max_points: int,
          phase_step: float, refine_passes: int, extend_for_loop: bool) -> np.ndarray:
    """Shared grid builder (see :func:`frequency_grid` for the rule)."""
    nvar = len(poles)
    wnyq = math.pi / dt if dt is not None else math.inf
    feats_w, feats_z = [], []
    for p, z in zip(poles, zeros):
        s = _s_equivalent(list(np.ravel(p)) + list(np.ravel(z)), dt)
        mag = np.abs(s)
        keep = mag > 0
        if dt is not None:
            keep &= np.abs(s.imag) <= wnyq * (1 + 1e-12)
        feats_w.append(mag[keep])
        feats_z.append(-s.real[keep] / mag[keep])
    allw = np.concatenate(feats_w + [np.empty(0)])
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
    for fw, fz in zip(feats_w, feats_z):
        for wn, zeta in zip(fw, fz):
            if 0 < abs(zeta) < resonance_zeta and np.isfinite(wn):
                wd = wn * math.sqrt(max(1.0 - zeta * zeta, 0.0))
                parts.append(wd + abs(zeta) * wn * t)
                parts.append(wd * (1 + np.logspace(-6, -1, 11)))
                parts.append(wd * (1 - np.logspace(-6, -1, 11)))
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
    for v in range(nvar):
        m = sum(ar.order for ar in axis if ar.variant == v and ar.w == 0.0)
        m -= sum(ar.order for ar in _axis_roots([zeros[v]], dt, axis_tol=1e-9) if ar.w == 0.0)
        a = h[v, 0]
        if np.isfinite(a) and a > 0 and m != 0:
            # |L| ~ c w^-m below every feature: the unity crossing is at lo * a^(1/m)
            target = 100.0 if m > 0 else 0.01
            if (m > 0 and a < target) or (m < 0 and a > target):
                lo = min(lo, lo * (a / target) ** (1.0 / m) / 2.0)
        if dt is None:
            r = len(np.ravel(poles[v])) - len(np.ravel(zeros[v]))
            b = h[v, 1]
            if r > 0 and np.isfinite(b) and b > 0.01:
                hi = max(hi, hi * (b / 0.01) ** (1.0 / r) * 2.0)
    return lo, hi


def _refine_adaptively(evaluate, w, nvar, axis_w, *, phase_step, passes, max_points):
    """Bisect intervals where any variant's phase turns more than ``phase_step`` rad or its
    magnitude changes by more than a factor e^phase_step (boundary-pole intervals excluded)."""
    for _ in range(passes):
        h = _call(evaluate, w, nvar)
        with np.errstate(divide="ignore", invalid="ignore"):
            dph = np.abs(np.angle(h[:, 1:] / h[:, :-1]))
            dmag = np.abs(np.diff(np.log(np.abs(h) + _TINY), axis=1))
        bad = np.zeros(w.size - 1, bool)
        for arr in (dph, dmag):
            arr = np.where(np.isfinite(arr), arr, 0.0)
            bad |= np.any(arr > phase_step, axis=0)
        if axis_w.size:
            for w0 in axis_w:
                i = np.searchsorted(w, w0)
                if 0 < i < w.size:
                    bad[i - 1] = False
        if not bad.any() or w.size + bad.sum() > max_points:
            break
        mids = 0.5 * (w[:-1][bad] + w[1:][bad])
        w = np.unique(np.concatenate([w, mids]))
    return w


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
    * ``w = 0`` always (dropped only where a variant has a pole there);
    * 41 points across ``+-10 zeta wn`` of every pole or zero with damping below
      ``resonance_zeta`` plus geometric points approaching its damped frequency;
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
        Sorted, unique frequencies in rad/s.
    """
    delay = estimate_delay(fb) if fb.dt is None else None
    return _grid(fb.evaluate, fb.dt, fb.poles, fb.zeros, points_per_decade=points_per_decade,
                 w_min=w_min, w_max=w_max, resonance_zeta=resonance_zeta, delay=delay,
                 axis_tol=axis_tol, max_points=max_points, phase_step=phase_step,
                 refine_passes=refine_passes, extend_for_loop=True)


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


def _roots_on_grid(fun_grid: np.ndarray, fun_scalar, w: np.ndarray, mask: np.ndarray,
                   *, xrtol: float, interior: slice) -> list[np.ndarray]:
    """Per variant, refined roots of a real function from its sign changes on the grid."""
    nvar = fun_grid.shape[0]
    out = []
    for v in range(nvar):
        f = fun_grid[v]
        roots = []
        idx = np.arange(w.size)[interior]
        for i in idx[:-1]:
            a, b = f[i], f[i + 1]
            if mask[v, i] or not (np.isfinite(a) and np.isfinite(b)):
                continue
            if a == 0.0 and i != idx[0]:
                roots.append(w[i])
            elif a * b < 0:
                try:
                    r = brentq(lambda x: fun_scalar(x, v), w[i], w[i + 1],
                               xtol=xrtol * w[i + 1], rtol=4 * np.finfo(float).eps)
                except ValueError as e:
                    raise ComputeError(f"crossing refinement failed near {w[i]:.6g} rad/s for "
                                       f"variant {v}: {e}") from e
                roots.append(r)
        out.append(np.array(sorted(roots)))
    return out


def _crossing_setup(fb: FreqBatch, grid):
    w = frequency_grid(fb) if grid is None else np.asarray(grid, float)
    axis = _axis_roots(fb.poles, fb.dt, axis_tol=1e-9)
    mask = _pole_interval_mask(w, axis, fb.nvar)
    L = _call(fb.evaluate, w, fb.nvar)
    return w, axis, mask, L


def gain_crossovers(fb: FreqBatch, *, grid: np.ndarray | None = None,
                    xrtol: float = 1e-14) -> list[np.ndarray]:
    """Every frequency w > 0 with |L(jw)| = 1, per variant (rad/s).

    Sign changes of ``ln|L|`` on the grid (:func:`frequency_grid` unless ``grid`` is given) are
    refined with :func:`scipy.optimize.brentq` to relative tolerance ``xrtol``.  Intervals holding
    a pole on the imaginary axis (unit circle) are skipped.
    """
    w, axis, mask, L = _crossing_setup(fb, grid)
    g = np.log(np.abs(L) + _TINY)
    start = 1 if w[0] == 0.0 else 0
    return _roots_on_grid(g, lambda x, v: math.log(abs(_row(fb.evaluate, x, v, fb.nvar)) + _TINY),
                          w, mask, xrtol=xrtol, interior=slice(start, None))


def _phase_crossings_all(fb: FreqBatch, w, mask, L, xrtol) -> list[np.ndarray]:
    """All w > 0 (below pi/dt) with Im L = 0, whatever the sign of Re L."""
    with np.errstate(divide="ignore", invalid="ignore"):
        g = L.imag / (np.abs(L) + _TINY)

    def scalar(x, v):
        val = _row(fb.evaluate, x, v, fb.nvar)
        return val.imag / (abs(val) + _TINY)

    start = 1 if w[0] == 0.0 else 0
    stop = w.size - 1 if (fb.dt is not None and w[-1] >= math.pi / fb.dt * (1 - 1e-12)) else w.size
    return _roots_on_grid(g, scalar, w, mask, xrtol=xrtol, interior=slice(start, stop))


def phase_crossovers(fb: FreqBatch, *, grid: np.ndarray | None = None,
                     xrtol: float = 1e-14) -> list[np.ndarray]:
    """Every phase crossover per variant (rad/s): L real and negative.

    Zeros of ``Im L / |L|`` with ``w > 0`` refined by :func:`scipy.optimize.brentq` and kept
    where ``Re L < 0``; plus ``w = 0`` when L(0) is finite and negative; plus ``pi/dt`` for a
    discrete loop when ``L(-1) < 0``.
    """
    w, axis, mask, L = _crossing_setup(fb, grid)
    return _phase_crossovers_from(fb, w, mask, L, xrtol)


def _phase_crossovers_from(fb, w, mask, L, xrtol):
    allc = _phase_crossings_all(fb, w, mask, L, xrtol)
    out = []
    end = _call(fb.evaluate, [0.0] + ([math.pi / fb.dt] if fb.dt is not None else []), fb.nvar)
    for v, c in enumerate(allc):
        vals = _call(fb.evaluate, c, fb.nvar)[v] if c.size else np.empty(0, complex)
        keep = list(c[(vals.real < 0) & (np.abs(vals) > _TINY)])
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

def peak_gain(evaluate, dt, poles, zeros, *, w_range: tuple[float, float] = (0.0, math.inf),
              grid: np.ndarray | None = None, candidate_ratio: float = 0.5,
              xrtol: float = 1e-10, far_factor: float = 1e8, max_candidates: int = 50
              ) -> tuple[np.ndarray, np.ndarray]:
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
        Extra grid points (rad/s), e.g. the loop's :func:`frequency_grid`.
    candidate_ratio : float
        Every local grid maximum whose value is at least this fraction of the largest grid value
        is refined by bounded optimisation between its grid neighbours (at most
        ``max_candidates`` of them, the highest first; flat stretches, where both neighbours
        agree to 1e-12, are not refined).
    xrtol : float
        Relative frequency tolerance of that optimisation.
    far_factor : float
        Continuous H with an unbounded range: the limit at infinite frequency is taken as
        ``|H|`` at ``far_factor`` times the grid end (exact to ``far_factor**-r`` for a
        rational H of relative degree r).

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
    w = _grid(evaluate, dt, poles, zeros, points_per_decade=40, w_min=None, w_max=None,
              resonance_zeta=0.3, delay=None, axis_tol=1e-9, max_points=200_000,
              phase_step=0.35, refine_passes=6, extend_for_loop=False)
    if grid is not None:
        w = np.unique(np.concatenate([w, np.asarray(grid, float)]))
    if math.isfinite(hi):
        w = np.unique(np.concatenate([w[(w >= lo) & (w <= hi)], [lo, hi]]))
    else:
        w = np.unique(np.concatenate([w[w >= lo], [lo]]))
    axis = _axis_roots(poles, dt, axis_tol=1e-9)
    peak = np.zeros(nvar)
    wpk = np.zeros(nvar)
    h = np.abs(_call(evaluate, w, nvar))
    for ar in axis:
        if lo <= ar.w <= hi:
            peak[ar.variant] = math.inf
            wpk[ar.variant] = ar.w
    for v in range(nvar):
        if math.isinf(peak[v]):
            continue
        ok = np.isfinite(h[v])
        if not ok.any():
            raise ComputeError(f"variant {v}: the response is not finite at any grid frequency; "
                               "check the evaluator")
        # points where the evaluator could not give a finite value (no pole there, e.g. 0/0
        # of an integrator at w = 0) are left out
        hv, wv = h[v][ok], w[ok]
        top = float(np.max(hv))
        best, wbest = top, float(wv[int(np.argmax(hv))])
        n = wv.size
        left = np.concatenate([[-math.inf], hv[:-1]])
        right = np.concatenate([hv[1:], [-math.inf]])
        flat = (np.abs(left - hv) <= 1e-12 * hv) & (np.abs(right - hv) <= 1e-12 * hv)
        cand = np.flatnonzero((hv >= left) & (hv >= right) & (hv >= candidate_ratio * top) & ~flat)
        cand = cand[np.argsort(-hv[cand], kind="stable")][:max_candidates]
        for i in cand:
            a = wv[max(i - 1, 0)]
            b = wv[min(i + 1, n - 1)]
            if b <= a:
                continue
            res = minimize_scalar(lambda x: -abs(_row(evaluate, x, v, nvar)), bounds=(a, b),
                                  method="bounded",
                                  options={"xatol": max(xrtol * b, 1e-300), "maxiter": 500})
            val = -float(res.fun)
            if np.isfinite(val) and val > best:
                best, wbest = val, float(res.x)
        peak[v], wpk[v] = best, wbest
    if dt is None and not math.isfinite(hi):
        # the supremum may be the limit at infinite frequency (biproper H): compare with a
        # value far beyond every feature and report w_peak = inf when it wins
        far = _call(evaluate, [far_factor * float(w[-1])], nvar)[:, 0]
        for v in range(nvar):
            if math.isfinite(peak[v]) and np.isfinite(far[v]) and abs(far[v]) > peak[v]:
                peak[v], wpk[v] = abs(far[v]), math.inf
    return peak, wpk


def bandwidth(evaluate_T, dt, poles, zeros, *, drop_db: float = 3.0, grid: np.ndarray | None = None,
              xrtol: float = 1e-14) -> np.ndarray:
    """Closed-loop bandwidth: first w where |T| falls to ``10^(-drop_db/20) |T(0)|`` (rad/s).

    The absolute DC gain is used (a negative DC gain is fine).  The first grid point below the
    level brackets the crossing, which is refined with :func:`scipy.optimize.brentq` on
    ``ln|T|``.

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
    w = _grid(evaluate_T, dt, poles, zeros, points_per_decade=40, w_min=None, w_max=None,
              resonance_zeta=0.3, delay=None, axis_tol=1e-9, max_points=200_000,
              phase_step=0.35, refine_passes=6, extend_for_loop=False)
    if grid is not None:
        w = np.unique(np.concatenate([w, np.asarray(grid, float)]))
    if dt is not None:
        w = w[w <= math.pi / dt]
    h = np.abs(_call(evaluate_T, w, nvar))
    out = np.full(nvar, math.inf)
    for v in range(nvar):
        t0 = h[v, 0]
        if not np.isfinite(t0) or t0 == 0.0:
            raise ComputeError(f"bandwidth needs a finite nonzero DC gain; variant {v} has "
                               f"|T(0)| = {t0}; check the loop (integrators, zeros at 0)")
        level = math.log(t0) - drop_db / 20.0 * math.log(10.0)
        below = np.flatnonzero(np.log(h[v] + _TINY) < level)
        if below.size == 0:
            continue
        i = int(below[0])
        out[v] = brentq(lambda x: math.log(abs(_row(evaluate_T, x, v, nvar)) + _TINY) - level,
                        w[i - 1], w[i], xtol=xrtol * w[i], rtol=4 * np.finfo(float).eps)
    return out


_MARGIN_NAMES = frozenset({"DiskMargin", "Margins", "closed_loop_unstable_count", "disk_margin",
                           "encirclements", "margins"})


def __getattr__(name):
    """Re-export the margin functions of :mod:`ledger.engine.margins` (imported on first use)."""
    if name in _MARGIN_NAMES:
        from ledger.engine import margins as _m
        return getattr(_m, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
