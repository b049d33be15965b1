"""Frequency grids: the pole/zero-aware base grid, end extension for loop gains, and adaptive
refinement (see :func:`frequency_grid` for the rule)."""

from __future__ import annotations

import math

import numpy as np

from ledger.errors import ComputeError
from ledger.engine.freqeval import _TINY, _axis_roots, _call, _memo, _pad, estimate_delay
from ledger.engine.types import FreqBatch

# ----------------------------------------------------------------------------------------------
# grids
# ----------------------------------------------------------------------------------------------

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
    if not (math.isfinite(lo) and math.isfinite(hi)):  # a pole or zero near the float limit
        raise ComputeError(f"frequency range [{lo:.3g}, {hi:.3g}] rad/s is not representable; "
                           "a pole or zero lies beyond 1e100 rad/s (docs/models.md)")

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


def _step_bad(ha, hb, aa, ab, phase_step):
    """Per interval (columns): does any variant's phase turn more than ``phase_step`` rad, or
    its magnitude change by more than a factor ``e^phase_step``, from ``ha`` to ``hb``
    (``aa``, ``ab``: ``|h| + tiny``)?  Intervals next to an exact zero, and non-finite steps,
    do not count.

    Decided without a logarithm or an angle: ``|arg(hb/ha)| > step`` is ``arg(hb conj(ha))``
    outside ``(-step, step)``, i.e. not (real part > 0 and ``|imag| <= tan(step) real``), for
    ``step < pi/2``; the magnitude test compares ``ab`` with ``e^step aa`` directly.  Where a
    value is not finite (or the product overflows) the test is the one written with the
    logarithm and the angle."""
    ok = ~((ha == 0) | (hb == 0))
    q = hb * np.conj(ha)
    fin = np.isfinite(q)           # both values finite and the product not overflowed
    grow = math.exp(phase_step)
    turn = ~((q.real > 0) & (np.abs(q.imag) <= math.tan(phase_step) * q.real))
    bad = fin & ok & (turn | (ab > grow * aa) | (aa > grow * ab))
    if not fin.all():
        i = ~fin & ok
        with np.errstate(divide="ignore", invalid="ignore"):
            # a phase step needs both ends finite: next to an infinite value (a pole at
            # w = 0) the quotient is a signed zero, whose angle may read pi
            both = np.isfinite(ha[i]) & np.isfinite(hb[i])
            dph = np.where(both, np.abs(np.angle(hb[i] / ha[i])), np.nan)
            dmag = np.abs(np.log(ab[i]) - np.log(aa[i]))
        bad[i] = (((dph > phase_step) & np.isfinite(dph))
                  | ((dmag > phase_step) & np.isfinite(dmag)))
    return np.any(bad, axis=0)


def _refine_adaptively(evaluate, w, nvar, axis_w, *, phase_step, passes, max_points):
    """Bisect intervals where any variant's phase turns more than ``phase_step`` rad or its
    magnitude changes by more than a factor e^phase_step (boundary-pole intervals, and the
    phase and magnitude change next to a non-finite value or an exact zero, excluded).

    Returns the grid and the values on it when the last pass evaluated exactly that grid
    (else ``None``)."""
    if not 0 < phase_step < math.pi / 2:
        raise ComputeError(f"phase step {phase_step} rad must be in (0, pi/2)")
    h = None
    raw = None
    for _ in range(passes):
        # values are pointwise: after the first pass only the new midpoints are evaluated,
        # and only the intervals next to them are checked again (the others were fine)
        if h is None:
            h = _call(evaluate, w, nvar)
            am = np.abs(h) + _TINY                       # magnitude at every point
            J = None                                     # every interval
            raw = np.zeros(w.size - 1, bool)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            if J is None:
                step_bad = _step_bad(h[:, :-1], h[:, 1:], am[:, :-1], am[:, 1:], phase_step)
            else:
                step_bad = _step_bad(h[:, J], h[:, J + 1], am[:, J], am[:, J + 1], phase_step)
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
        amn = np.empty((nvar, wn.size))
        amn[:, ~fresh] = am
        amn[:, fresh] = np.abs(hn[:, fresh]) + _TINY
        # intervals between two old points keep their old verdict (a bad one whose midpoint
        # coincided with an end is checked again)
        old_left = np.searchsorted(w, wn[:-1])
        both_old = ~fresh[:-1] & ~fresh[1:]
        rawn = np.zeros(wn.size - 1, bool)
        rawn[both_old] = raw[np.minimum(old_left[both_old], raw.size - 1)]
        J = np.flatnonzero(~both_old | rawn)
        rawn[J] = False
        w, h, am, raw = wn, hn, amn, rawn
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
