"""Gain and phase crossovers of loop gains, refined by bracketed root finding, and the pairwise
evaluator of loop functions shared with the margins."""

from __future__ import annotations

import math

import numpy as np

from ledger.engine.freqeval import (_TINY, _AxisRoot, _axis_roots, _call, _memo,
                                    estimate_delay)
from ledger.engine.freqgrid import frequency_grid
from ledger.engine.freqsolve import _Sampler, _vsolve
from ledger.engine.types import FreqBatch

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
    return pairwise_from(_crossing_setup(fb, None)[3], kind)


def pairwise_from(smp, kind: str):
    """The pairwise evaluator of :func:`loop_pairwise` on a given sampler of L; it carries
    ``dlog(vi, w)``, the frequency derivative of the function's logarithm."""

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

    def dlog(vi, x):
        """``d ln F / dw`` of the function from ``d ln L / dw`` (NaN where unknown)."""
        dl = smp.dlog(vi, x)
        if kind == "L":
            return dl
        lv = smp.at(vi, x)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            if kind == "S":
                out = -lv * dl / (1.0 + lv)
            elif kind == "T":
                out = dl / (1.0 + lv)
            else:
                out = -2.0 * lv * dl / (1.0 - lv * lv)
        return np.where(np.isfinite(lv), out, np.nan)

    at.dlog = dlog
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
