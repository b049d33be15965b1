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
  step the delayed input ``w`` is the cubic Hermite interpolant of its (known, past) end values
  and end slopes (``z' = Cz (A x + B u + Bw w) + Dzw w'`` is known from the state history) and
  the linear part is integrated exactly for that cubic with ``Z = [x; u; p0; p1; p2; p3]``,
  ``w = p0``, ``p0' = p1``, ``p1' = p2``, ``p2' = p3``, ``p3' = 0``.  The only error is the
  interpolation of ``w``: fourth order, ``O(h^4)`` (halving ``h`` divides the error by about
  16).  Jumps of ``w``, ``y`` and of their slopes at multiples of ``tau`` fall on grid points and
  are kept as left and right limits.
* ``io_delay`` shifts the whole response (zero before it).

Between samples the response on each step is ``y(t_k + s) = Cy expm(M s) Z_k`` with
``y' = Cy M expm(M s) Z_k`` and ``y'' = Cy M^2 expm(M s) Z_k``.  Every extremum (sign change of
``y'`` over a step) and every level crossing is refined on that exact expression by a bracketed
Newton iteration (quadratic convergence, bisection safeguard), vectorised over all problems at
once; this plays the role of a scalar root finder (brentq) applied per problem.  That
refinement lives in :mod:`ledger.engine.steprefine`; this module holds the final value, the
response and the metric readers (rise, settling, overshoot, peaks, recovery).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg

from ledger.engine.simulation import Pieces, simulate
from ledger.engine.steprefine import _Problems, _refine, _solve  # noqa: F401 (_Problems: tests)
from ledger.engine.ssbatch import balance, equilibrium, has_delay, mats
from ledger.engine.timegrid import check_stable
from ledger.engine.types import SSBatch
from ledger.errors import ComputeError

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


# --------------------------------------------------------------------------- final value
def final_value(sys: SSBatch, amplitude: float = 1.0, *, singular_rcond: float = 1e-12) -> np.ndarray:
    """Steady-state output for a step, by the final-value theorem from the matrices.

    Solves the equilibrium ``0 = A x + B u + Bw w`` (discrete: ``x = A x + B u``) with
    ``w = z = Cz x + Dz u + Dzw w`` and returns ``C x + D u + Dw w``, in balanced state
    coordinates (:func:`~ledger.engine.timegrid.balance`), so that a realisation with entries
    far apart is not mistaken for a singular one.

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
    _, _, y = equilibrium(balance(sys), amplitude, singular_rcond)
    if not has_delay(sys):
        check_stable(sys)
    return y


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
    p = simulate(sys, amplitude, tail_rtol=tail_rtol, max_samples=max_samples, **grid_kw)
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
    if sys.dt is not None or has_delay(sys):
        raise ComputeError("evaluate_at needs a continuous system without internal delay;"
                           " use step_response for discrete or delayed loops")
    A, B, C, D = mats(balance(sys))
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


def _extreme(p: Pieces, sgn: np.ndarray, largest: bool, absolute: bool = False):
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


def _first_reach(p: Pieces, sgn: np.ndarray, L: np.ndarray) -> np.ndarray:
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
                      sgn[sel] * L[sel], order=0, want_value=False)
        res[sel] = tk[sel] + s
    return res


def _last_exceed(p: Pieces, c: np.ndarray, band: np.ndarray) -> np.ndarray:
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
                      order=0, want_value=False)
        res[sel] = tk[sel] + s
    return res


def _shift_settle(ts: np.ndarray, c: np.ndarray, band: np.ndarray, io_delay: float) -> np.ndarray:
    """Settling/recovery time with the output held at 0 during ``io_delay``."""
    if io_delay <= 0:
        return ts
    out_before = np.abs(c) > band
    return np.where(out_before | (ts > 0), ts + io_delay, 0.0)


def _sup_abs(p: Pieces):
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
    p = simulate(sys, amplitude, tail_rtol=tail_rtol, max_samples=max_samples, **grid_kw)
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
    p = simulate(sys, amplitude, tail_rtol=tail_rtol, max_samples=max_samples, **grid_kw)
    _refine(p, near_extremes="abs")
    return _sup_abs(p)


def recovery(sys: SSBatch, *, amplitude: float = 1.0, band: float = 0.02, basis: str = "peak",
             tail_rtol: float = 1e-6, max_samples: int = 200_000, to: str = "final",
             **grid_kw):
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
    to : {"final", "zero"}, default "final"
        What the response recovers to: its final value ``yf``, or zero.  With ``"zero"`` a
        final value outside the band never recovers (``inf``).

    Returns
    -------
    peak : ndarray (V,)
        ``sup |y|``, output units.
    peak_time : ndarray (V,)
        s (``inf`` when only approached as t -> inf).
    recovery_time : ndarray (V,)
        Last time ``|y - c|`` exceeds the band, s (0 if never), with ``c = yf`` or ``0``.
    """
    if basis not in ("peak", "absolute"):
        raise ComputeError(f"basis {basis!r} must be 'peak' or 'absolute'")
    if to not in ("final", "zero"):
        raise ComputeError(f"recovery to {to!r} must be 'final' or 'zero'")
    if not band > 0:
        raise ComputeError(f"band {band!r} must be positive")
    p = simulate(sys, amplitude, tail_rtol=tail_rtol, max_samples=max_samples, **grid_kw)
    _refine(p, near_extremes="abs")
    pk, tpk = _sup_abs(p)
    b = band * pk if basis == "peak" else np.full_like(pk, float(band))
    c = p.final if to == "final" else np.zeros_like(p.final)
    _refine(p, (c + b, c - b), near_extremes=False)
    b = band * pk if basis == "peak" else np.full_like(pk, float(band))
    never = np.abs(p.final - c) > b  # ends outside the band: never recovers
    if np.all(never):
        return pk, tpk, np.full_like(pk, np.inf)
    ok = ~never
    rt = np.full_like(pk, np.inf)
    if np.all(ok):
        rt = _shift_settle(_last_exceed(p, c, b), c, b, p.io_delay)
    else:
        rt[ok] = _shift_settle(_last_exceed(_rows(p, ok), c[ok], b[ok]), c[ok], b[ok],
                               p.io_delay)
    return pk, tpk, rt


def _rows(p: Pieces, m: np.ndarray) -> Pieces:
    """The pieces of the variants ``m`` (a boolean mask)."""
    from dataclasses import fields, replace

    kw = {}
    for f in fields(p):
        v = getattr(p, f.name)
        if f.name in ("t", "io_delay", "discrete"):
            continue
        if isinstance(v, np.ndarray) and v.ndim >= 1 and v.shape[0] == m.size:
            kw[f.name] = v[m]
    return replace(p, **kw)
