"""Stability margins, Nyquist encirclements and the balanced disk margin of a loop batch.

Definitions follow the metric definitions of the design notes:

* gain margin at every phase crossover (L real and negative), ``-20 log10 |L|`` in dB; the upper
  margin is the smallest positive one, the lower margin the largest negative one;
* phase margin ``180 deg + arg L`` at every gain crossover (|L| = 1), wrapped to (-180, 180];
  the worst (smallest) one is reported;
* delay margin: the smallest ``((180 deg + arg L) mod 360 deg)[rad] / w`` over every gain
  crossover ``w > 0``: the extra loop delay that first puts a closed-loop pole on the
  stability boundary (a delay ``tau`` turns ``L(jw)`` by ``-w tau`` and leaves ``|L|``
  alone, so the Nyquist curve first passes through -1 at a gain crossover);
* balanced disk margin (skew 0): ``alpha = 1 / sup_w |S - 1/2|`` (Seiler, Packard and Gahinet,
  "An introduction to disk margins", IEEE Control Systems Magazine, 2020).

No function here decides closed-loop stability by itself except :func:`encirclements` and
:func:`closed_loop_unstable_count`; margins of an unstable loop are still reported (a negative
margin says so) and the caller flags the instability.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ledger.errors import ComputeError
from ledger.engine.types import FreqBatch
from ledger.engine.crossings import (_crossing_setup, pairwise_from, _gain_crossings, _phase_crossings_all,
                                     _phase_crossovers_from, _split_by_variant)
from ledger.engine.freqeval import _axis_roots, _call, estimate_delay
from ledger.engine.freqgrid import frequency_grid
from ledger.engine.peaks import peak_gain

__all__ = [
    "Margins",
    "DiskMargin",
    "margins",
    "encirclements",
    "closed_loop_unstable_count",
    "disk_margin",
]

#: a gain crossover whose phase is within this of -180 deg (rad) sits on the stability boundary:
#: its delay margin is 0 (crossovers are refined to ~1e-14 relative, far below this)
_ON_BOUNDARY = 1e-9


@dataclass(frozen=True, eq=False)
class Margins:
    """Classical margins of V loops; every array has shape (V,).

    Attributes
    ----------
    gain_margin : ndarray
        Upper gain margin, dB: smallest positive ``-20 log10|L|`` over phase crossovers
        (``inf`` if none).
    gain_margin_lower : ndarray
        Lower gain margin, dB: largest negative one (``-inf`` if none).
    phase_crossover : ndarray
        Frequency of the upper gain margin, rad/s (``inf`` if none).
    phase_crossover_lower : ndarray
        Frequency of the lower gain margin, rad/s (``inf`` if none).
    phase_margin : ndarray
        Worst phase margin, deg, in (-180, 180] (``inf`` if there is no gain crossover).
    gain_crossover : ndarray
        Frequency of the worst phase margin, rad/s (``inf`` if there is no gain crossover).
    delay_margin : ndarray
        Extra loop delay, s, that brings the loop to the stability boundary: the minimum over
        *every* gain crossover ``w_c > 0`` of ``((180 deg + arg L(j w_c)) mod 360 deg)`` in
        radians divided by ``w_c``, whatever the sign of that crossover's phase margin (a
        crossover with a negative phase margin needs almost a full turn, but at a high
        frequency that can still be the smallest delay).  A crossover with ``arg L`` exactly
        -180 deg gives 0.  ``inf`` without gain crossover.  A crossover at ``w = 0`` (``|L(0)|
        = 1``) is not counted: a delay leaves ``L(0)`` unchanged.  The phase of ``L`` already
        holds the loop's own delay, so this is the delay *added* to it.  For discrete loops the
        same formula in seconds on ``z = exp(jw dt)``, ``0 < w < pi/dt`` (a delay of
        ``delay_margin/dt`` samples, not necessarily an integer).  A property of ``L`` only:
        when the closed loop is already unstable it is not a margin
        (:func:`ledger.engine.measure.measure` reports 0 then).
    phase_crossovers, gain_margins : tuple of ndarray
        Per variant, every phase crossover (rad/s) and its gain margin (dB).
    gain_crossovers, phase_margins : tuple of ndarray
        Per variant, every gain crossover (rad/s) and its phase margin (deg).
    """

    gain_margin: np.ndarray
    gain_margin_lower: np.ndarray
    phase_crossover: np.ndarray
    phase_crossover_lower: np.ndarray
    phase_margin: np.ndarray
    gain_crossover: np.ndarray
    delay_margin: np.ndarray
    phase_crossovers: tuple
    gain_margins: tuple
    gain_crossovers: tuple
    phase_margins: tuple


@dataclass(frozen=True, eq=False)
class DiskMargin:
    """Balanced (skew 0) disk margin of V loops; arrays of shape (V,).

    Attributes
    ----------
    alpha : ndarray
        Disk size ``1 / sup_w |S - 1/2|`` (dimensionless); 0 for an unstable closed loop.
    gain_low_db, gain_high_db : ndarray
        Guaranteed gain interval, dB: ``20 log10((1 -+ alpha/2) / (1 +- alpha/2))``;
        ``-inf``/``inf`` when ``alpha >= 2``.
    phase_deg : ndarray
        Guaranteed phase variation, +- degrees: ``2 atan(alpha / 2)``.
    frequency : ndarray
        Frequency in rad/s where ``|S - 1/2|`` peaks.
    """

    alpha: np.ndarray
    gain_low_db: np.ndarray
    gain_high_db: np.ndarray
    phase_deg: np.ndarray
    frequency: np.ndarray


def _flat(per_variant: list) -> tuple[np.ndarray, np.ndarray]:
    """(variant index, value) arrays of a list of per-variant arrays, variants in order."""
    vi = np.concatenate([np.full(np.size(c), v, int) for v, c in enumerate(per_variant)]
                        + [np.empty(0, int)])
    x = np.concatenate([np.asarray(c, float).ravel() for c in per_variant] + [np.empty(0)])
    return vi, x


def _first_best(x: np.ndarray, vi: np.ndarray, sel: np.ndarray, nvar: int, *,
                largest: bool) -> np.ndarray:
    """Per variant with a selected entry: the index of its smallest (largest) selected ``x``,
    the first one on ties (what ``argmin``/``argmax`` over the variant's entries give)."""
    idx = np.flatnonzero(sel)
    if idx.size == 0:
        return idx
    best = np.full(nvar, -math.inf if largest else math.inf)
    (np.maximum if largest else np.minimum).at(best, vi[idx], x[idx])
    hit = idx[x[idx] == best[vi[idx]]]
    _, first = np.unique(vi[hit], return_index=True)
    return hit[first]


def margins(fb: FreqBatch, *, grid: np.ndarray | None = None, xrtol: float = 1e-14) -> Margins:
    """Gain, phase and delay margins of every variant (see :class:`Margins`).

    Parameters
    ----------
    fb : FreqBatch
        Loop gains.
    grid : ndarray, optional
        Frequencies (rad/s) to search; :func:`frequency_grid` by default.
    xrtol : float
        Relative frequency tolerance of the crossover refinement.
    """
    w, mask, L, smp = _crossing_setup(fb, grid)
    pcs = _phase_crossovers_from(fb, smp, w, mask, L, xrtol)
    gcs = _gain_crossings(smp, w, mask, L, xrtol)
    V = fb.nvar
    gm, gml = np.full(V, math.inf), np.full(V, -math.inf)
    wpc, wpcl = np.full(V, math.inf), np.full(V, math.inf)
    pm, wgc, dm = np.full(V, math.inf), np.full(V, math.inf), np.full(V, math.inf)
    # all variants at once: flat arrays of (variant, frequency, value), variants in order
    pv, pw = _flat(pcs)
    gv, gw = _flat(gcs)
    lpf = smp.at(pv, pw)
    lgf = smp.at(gv, gw)
    g = -20.0 * np.log10(np.abs(lpf))
    gms = _split_by_variant(g, pv, V)
    i = _first_best(g, pv, g > 0, V, largest=False)
    gm[pv[i]], wpc[pv[i]] = g[i], pw[i]
    i = _first_best(g, pv, g < 0, V, largest=True)
    gml[pv[i]], wpcl[pv[i]] = g[i], pw[i]
    p = np.degrees(np.angle(-lgf))
    p = np.where(p <= -180.0, p + 360.0, p)
    pms = _split_by_variant(p, gv, V)
    i = _first_best(p, gv, np.ones(p.size, bool), V, largest=False)
    pm[gv[i]], wgc[gv[i]] = p[i], gw[i]
    has = np.bincount(gv, minlength=V) > 0
    # the delay that turns L(j w_c) onto -1: the phase margin taken in [0, 2 pi), over every
    # crossover (gain crossings are found for w > 0 only, see _gain_crossings)
    turn = np.mod(np.angle(-lgf), 2.0 * math.pi)
    # L(j w_c) on -1 to within rounding (phase margin +-0 either side, which rounding may put
    # at 2 pi - 1e-16): the loop is on the boundary already, margin 0
    turn = np.where((turn < _ON_BOUNDARY) | (turn > 2.0 * math.pi - _ON_BOUNDARY), 0.0, turn)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = turn / gw
    dmin = np.full(V, math.inf)
    np.minimum.at(dmin, gv, r)
    dm[has] = dmin[has]
    return Margins(gain_margin=gm, gain_margin_lower=gml, phase_crossover=wpc,
                   phase_crossover_lower=wpcl, phase_margin=pm, gain_crossover=wgc,
                   delay_margin=dm, phase_crossovers=tuple(pcs), gain_margins=tuple(gms),
                   gain_crossovers=tuple(gcs), phase_margins=tuple(pms))


def _wrap(x: float) -> float:
    """Wrap an angle to [-pi, pi]."""
    return math.remainder(x, 2.0 * math.pi)


def encirclements(fb: FreqBatch, *, grid: np.ndarray | None = None, marginal_tol: float = 1e-9,
                  xrtol: float = 1e-14) -> np.ndarray:
    """Net clockwise encirclements N of -1 by the Nyquist contour of L, per variant.

    The contour runs up the imaginary axis (continuous; discrete: once round the unit circle
    counter-clockwise), around every boundary pole by a small indentation that leaves the pole
    on the stable side (right of it, outside the circle), and closes along the infinite arc.  The
    closed loop then has ``Z = N + P`` unstable poles, with P the open-loop poles in the open
    right half plane (outside the unit circle); see :func:`closed_loop_unstable_count`.

    The angle of ``1 + L`` is tracked exactly: all zeros of ``Im L`` are found by root finding
    and added to the grid, so between neighbouring points ``1 + L`` stays in one half plane and
    its angle change is fixed by the end values.  Delay-induced rotation is thereby followed
    wherever the grid resolves it; the mirrored half of the contour is taken by symmetry.

    Parameters
    ----------
    fb : FreqBatch
        Loop gains.
    grid : ndarray, optional
        Base grid (rad/s); :func:`frequency_grid` by default.
    marginal_tol : float
        If ``|1 + L| < marginal_tol`` somewhere on the contour, the closed loop has a pole on
        the stability boundary and a :class:`ComputeError` is raised.
    xrtol : float
        Relative tolerance of the ``Im L = 0`` refinement.

    Returns
    -------
    ndarray (V,) of int
    """
    V, dt = fb.nvar, fb.dt
    axis = _axis_roots(fb.poles, dt, axis_tol=1e-9)
    w0, mask0, L0, smp = _crossing_setup(fb, grid)
    roots = _phase_crossings_all(smp, dt, w0, mask0, L0, xrtol)
    w, mask, L = w0, mask0, L0
    n = w.size
    F = 1.0 + L
    angF = np.angle(F)
    wnyq = math.pi / dt if dt is not None else math.inf

    def marginal(v, wv):
        return ComputeError(f"variant {v}: 1 + L vanishes near {wv:.6g} rad/s, a closed-loop "
                            "pole sits on the stability boundary; change the gain or design")

    finite = np.isfinite(F)
    small = finite & (np.abs(np.where(finite, F, 1.0)) < marginal_tol)
    if small.any():
        v, i = (int(x[0]) for x in np.nonzero(small))
        raise marginal(v, w[i])
    # an interval without a root of Im L keeps 1 + L in the half plane of its end points
    im = np.where(np.isfinite(L.imag), L.imag, 0.0)
    sgn = np.sign(im[:, :-1] + im[:, 1:])
    a0, a1 = angF[:, :-1], angF[:, 1:]
    ok = ~mask
    bad = ok & ~(np.isfinite(a0) & np.isfinite(a1))
    if bad.any():
        v, i = (int(x[0]) for x in np.nonzero(bad))
        raise ComputeError(f"variant {v}: cannot follow the Nyquist curve near {w[i]:.6g} rad/s; "
                           "check the loop for poles on the axis")
    flat = ok & (sgn == 0)
    cross = flat & (F[:, :-1].real * F[:, 1:].real <= 0)
    if cross.any():
        v, i = (int(x[0]) for x in np.nonzero(cross))
        raise marginal(v, w[i])
    with np.errstate(invalid="ignore"):
        step = np.where(ok & ~flat, sgn * (np.abs(a1) - np.abs(a0)), 0.0)
    # intervals holding roots of Im L: split them at the roots (each variant its own roots,
    # evaluated pairwise) and take every piece in its own half plane
    vr = np.concatenate([np.full(r.size, v, int) for v, r in enumerate(roots)] + [np.empty(0, int)])
    rr = np.concatenate(list(roots) + [np.empty(0)])
    if rr.size:
        Fr = 1.0 + smp.at(vr, rr)
        tiny = np.abs(Fr) < marginal_tol
        if tiny.any():
            k = int(np.flatnonzero(tiny)[0])
            raise marginal(int(vr[k]), rr[k])
        iv = np.clip(np.searchsorted(w, rr, side="right") - 1, 0, n - 2)
        key = vr * n + iv
        first = np.ones(rr.size, bool)
        first[1:] = key[1:] != key[:-1]
        last = np.ones(rr.size, bool)
        last[:-1] = key[:-1] != key[1:]
        # pieces ending at each root, then the piece from the last root of a group onward
        sw = np.where(first, w[iv], np.roll(rr, 1))
        sF = np.where(first, F[vr, iv], np.roll(Fr, 1))
        ew, eF = rr, Fr
        sw = np.concatenate([sw, rr[last]])
        sF = np.concatenate([sF, Fr[last]])
        ew = np.concatenate([ew, w[iv[last] + 1]])
        eF = np.concatenate([eF, F[vr[last], iv[last] + 1]])
        pv = np.concatenate([vr, vr[last]])
        pk = np.concatenate([iv, iv[last]])
        mid = smp.at(pv, 0.5 * (sw + ew)).imag
        ps = np.sign(np.where(np.isfinite(mid), mid, 0.0))
        flatp = ps == 0
        if np.any(flatp & (sF.real * eF.real <= 0)):
            k = int(np.flatnonzero(flatp & (sF.real * eF.real <= 0))[0])
            raise marginal(int(pv[k]), sw[k])
        piece = np.where(flatp, 0.0, ps * (np.abs(np.angle(eF)) - np.abs(np.angle(sF))))
        step[vr, iv] = 0.0
        np.add.at(step, (pv, pk), piece)
    half = np.sum(step, axis=1)
    total = np.zeros(V)
    # indentations round boundary poles (the contour keeps them on the stable side)
    for ar in axis:
        v, k = ar.variant, ar.order
        if ar.w == 0.0:
            # small right-hand indentation round the integrator(s), traversed once
            total[v] += -k * math.pi + _wrap(2.0 * angF[v, 1] + k * math.pi)
        elif dt is not None and ar.w >= wnyq * (1 - 1e-12):
            total[v] += -k * math.pi + _wrap(-2.0 * angF[v, -2] + k * math.pi)
        else:
            i = int(np.searchsorted(w, ar.w))
            half[v] += -k * math.pi + _wrap(angF[v, i] - angF[v, i - 1] + k * math.pi)
    total += 2.0 * half
    if dt is None:
        tau = None
        for v in range(V):
            r = len(np.ravel(fb.poles[v])) - len(np.ravel(fb.zeros[v]))
            if r < 0:
                raise ComputeError(f"variant {v}: the loop gain is improper; add roll-off")
            if r == 0 and abs(L[v, -1]) >= 1.0 - 1e-9:
                tau = estimate_delay(fb) if tau is None else tau
                if tau[v] * w[-1] > 1e-3:
                    raise ComputeError(f"variant {v}: |L| >= 1 at high frequency with a delay; "
                                       "the closed loop is not of retarded type, reduce the "
                                       "feedthrough")
        # closing arc at infinite frequency (|L| < 1 there, so 1 + L turns less than pi)
        total += -2.0 * np.angle(F[:, -1])
    n = -total / (2.0 * math.pi)
    frac = np.abs(n - np.round(n))
    if np.any(frac > 0.25):
        v = int(np.argmax(frac))
        raise ComputeError(f"variant {v}: Nyquist angle count {n[v]:.3f} is not an integer; "
                           "the frequency grid is too coarse, raise points_per_decade")
    return np.round(n).astype(int)


def _open_loop_unstable(fb: FreqBatch, axis_tol: float = 1e-9) -> np.ndarray:
    P = np.zeros(fb.nvar, dtype=int)
    for v, p in enumerate(fb.poles):
        p = np.asarray(p, complex).ravel()
        if fb.dt is None:
            P[v] = int(np.sum(p.real > axis_tol * np.maximum(np.abs(p), 1.0)))
        else:
            P[v] = int(np.sum(np.abs(p) > 1.0 + axis_tol))
    return P


def closed_loop_unstable_count(fb: FreqBatch, **kwargs) -> np.ndarray:
    """Closed-loop poles in the closed right half plane (on/outside the unit circle), per variant.

    ``Z = N + P`` with N from :func:`encirclements` (keyword arguments are passed on) and P the
    open-loop poles in the open right half plane (outside the unit circle) from ``fb.poles``.
    ``Z == 0`` means the closed loop is stable.
    """
    return encirclements(fb, **kwargs) + _open_loop_unstable(fb)


def disk_margin(fb: FreqBatch, *, grid: np.ndarray | None = None, xrtol: float = 1e-10,
                check_stability: bool = True, unbounded_tol: float = 1e-9) -> DiskMargin:
    """Balanced disk margin (skew 0) of every variant (see :class:`DiskMargin`).

    ``alpha = 1 / sup_w |S(jw) - 1/2|`` with ``S = 1/(1+L)``; the peak is found by
    :func:`peak_gain` on ``(1 - L) / (2 (1 + L))`` over the loop grid, which the adaptive
    refinement densifies wherever ``S`` changes fast (a near approach to -1).  Variants whose closed loop is unstable get
    ``alpha = 0`` (no disk of perturbations keeps them stable) when ``check_stability``.
    The gain interval is unbounded (``+-inf`` dB) once ``alpha/2 >= 1 - unbounded_tol``.
    """
    V = fb.nvar
    w = frequency_grid(fb) if grid is None else np.asarray(grid, float)

    def half_diff(L):
        with np.errstate(divide="ignore", invalid="ignore"):
            h = (1.0 - L) / (2.0 * (1.0 + L))
        # at a pole of L, S - 1/2 = -1/2 exactly
        return np.where(np.isfinite(L), h, -0.5)

    def ev(x):
        return half_diff(_call(fb.evaluate, x, V))

    smp = _crossing_setup(fb, w)[3]
    feats = [np.concatenate([np.ravel(p), np.ravel(z)]) for p, z in zip(fb.poles, fb.zeros)]
    peak, wpk = peak_gain(ev, fb.dt, [np.empty(0)] * V, feats, grid=w, xrtol=xrtol,
                              pairwise=pairwise_from(smp, "S-1/2"))
    with np.errstate(divide="ignore"):
        alpha = np.where(np.isfinite(peak), 1.0 / peak, 0.0)
    if check_stability:
        alpha = np.where(closed_loop_unstable_count(fb, grid=None if grid is None else grid) > 0,
                         0.0, alpha)
    half = alpha / 2.0
    with np.errstate(divide="ignore", invalid="ignore"):
        hi = np.where(half < 1.0 - unbounded_tol, 20.0 * np.log10((1.0 + half) / np.maximum(1.0 - half, 1e-300)),
                      math.inf)
    lo = -hi
    ph = np.degrees(2.0 * np.arctan(half))
    return DiskMargin(alpha=alpha, gain_low_db=lo, gain_high_db=hi, phase_deg=ph, frequency=wpk)
