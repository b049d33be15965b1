"""Internal stability of an assembled loop and closed-loop pole measures.

* Delay-free loops (and every digital loop, whose delays live in the state): the eigenvalues
  of the whole interconnection of controller, plant and sensor realisations.  That covers
  all four of S, T, CS and PS, so an unstable pole-zero cancellation between controller and
  plant is caught even where T alone looks fine.
* Continuous loops with a delay: the Nyquist criterion on ``F(s) = 1 + L(s) e^{-s tau}``.
  The number of closed-loop poles in the closed right half plane is
  ``Z = P - (change of arg F along s = j w, w: 0 -> inf) / pi`` with ``P`` the open-loop
  poles in the open right half plane; imaginary-axis poles of L are passed on small
  half circles to their right (textbook Nyquist criterion, e.g. Franklin, Powell and
  Emami-Naeini, *Feedback Control of Dynamic Systems*, section 6.3).
* The prefilter sits outside the loop but on the r paths, so its poles must be stable too.

The decay rate of a continuous loop with a delay comes from the rightmost root of its
characteristic equation (:func:`rightmost_delayed_root`: a pseudospectral discretisation for
candidates, Newton's method on the exact equation, an argument-principle check).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import ComputeError
from .loop import Assembly, LoopGroup

__all__ = ["StabilityReport", "stability", "group_stability", "nyquist_unstable_count", "min_damping",
           "decay_rate", "min_damping_rows", "decay_rate_rows", "rightmost_delayed_root"]


@dataclass(frozen=True)
class StabilityReport:
    """Stability of every variant of an assembly.

    Attributes
    ----------
    stable : ndarray (V,) of bool
    unstable_poles : ndarray (V,) of int
        Closed-loop poles outside the stability region (closed RHP / on or outside the unit
        circle), prefilter poles included.
    method : str
        ``"poles"`` (eigenvalues) or ``"nyquist"`` (delayed continuous loops).
    reasons : tuple of str
        Per variant, ``""`` when stable, else a one-line reason.
    """

    stable: np.ndarray
    unstable_poles: np.ndarray
    method: str
    reasons: tuple


def _count_unstable(poles: np.ndarray, dt, tol: float) -> int:
    if poles.size == 0:
        return 0
    if dt is None:
        return int(np.sum(poles.real >= -tol))
    return int(np.sum(np.abs(poles) >= 1.0 - tol))


def stability(assembly: Assembly, *, tol: float = 1e-12, nyquist_points: int = 400,
              max_refine: int = 30) -> StabilityReport:
    """Decide internal stability of every variant.

    Parameters
    ----------
    assembly : Assembly
    tol : float, optional
        A pole with real part >= -tol (1/s; discrete: |z| >= 1 - tol) counts as unstable
        (default 1e-12).
    nyquist_points : int, optional
        Initial points per contour segment for delayed loops (default 400).
    max_refine : int, optional
        Bisection rounds of the Nyquist contour (default 30).

    Returns
    -------
    StabilityReport
    """
    V = len(assembly.variants)
    counts = np.zeros(V, dtype=int)
    reasons = [""] * V
    method = "poles"
    for g in assembly.groups:
        cnt, why, how = group_stability(g, assembly.dt, assembly.variants, tol=tol,
                                        nyquist_points=nyquist_points, max_refine=max_refine)
        counts[g.index] = cnt
        for j, i in enumerate(g.index):
            reasons[i] = why[j]
        if how == "nyquist":
            method = how
    return StabilityReport(stable=counts == 0, unstable_poles=counts, method=method,
                           reasons=tuple(reasons))


def group_stability(g: LoopGroup, dt, names, *, tol: float = 1e-12, nyquist_points: int = 400,
                    max_refine: int = 30) -> tuple[np.ndarray, list, str]:
    """:func:`stability` of one group: (unstable pole counts (V_g,), reasons (V_g,), method);
    ``names`` are the family's variant names (indexed by ``g.index``)."""
    pre = _count_unstable(g.prefilter_poles, dt, tol)
    if g.poles is not None:
        method = "poles"
        cnt = [_count_unstable(p, dt, tol) for p in g.poles]
    else:
        method = "nyquist"
        cnt = list(nyquist_unstable_count(g, points=nyquist_points, max_refine=max_refine))
    counts = np.zeros(len(g.index), dtype=int)
    reasons = [""] * len(g.index)
    for j, i in enumerate(g.index):
        counts[j] = cnt[j] + pre
        if cnt[j]:
            where = "in the closed right half plane" if dt is None \
                else "on or outside the unit circle"
            reasons[j] = (f"closed loop unstable for variant {names[i]!r}: "
                          f"{cnt[j]} pole(s) {where}")
        elif pre:
            reasons[j] = "the prefilter is unstable; give a stable prefilter"
    return counts, reasons, method


def _F(group: LoopGroup, j: int, s: np.ndarray) -> np.ndarray:
    """``1 + L(s)`` of variant ``j`` of the group at complex points ``s``, shape (1, len(s))."""
    K, Gs, H = group.blocks
    return (1.0 + Gs[j](s) * K(s) * H(s) * np.exp(-s * group.tau))[None, :]


def _refine(path, t: np.ndarray, F_of, max_refine: int, max_step: float):
    """Bisect a contour segment until the arg of F moves < max_step rad between points."""
    vals = F_of(path(t))
    for _ in range(max_refine):
        d = np.abs(np.angle(vals[:, 1:] / vals[:, :-1]))
        bad = np.any(~(d < max_step), axis=0)
        if not np.any(bad):
            break
        mid = 0.5 * (t[:-1][bad] + t[1:][bad])
        t = np.sort(np.concatenate([t, mid]))
        vals = F_of(path(t))
    return vals


def nyquist_unstable_count(group: LoopGroup, *, points: int = 400, max_refine: int = 30,
                           max_step: float = 0.3, axis_tol: float = 1e-9,
                           marginal_tol: float = 1e-9) -> np.ndarray:
    """Closed-loop right-half-plane pole count of a continuous (delayed) loop by Nyquist.

    Parameters
    ----------
    group : LoopGroup
        A continuous group.
    points : int, optional
        Initial points per segment (default 400).
    max_refine : int, optional
        Bisection rounds (default 30).
    max_step : float, optional
        Largest change of arg F between neighbouring contour points, rad (default 0.3).
    axis_tol : float, optional
        Open-loop poles with ``|Re p| <= axis_tol * max(1, |p|)`` are on the axis and are
        passed on half circles (default 1e-9, dimensionless).
    marginal_tol : float, optional
        ``min |1 + L|`` below this on the contour means a closed-loop pole on the axis,
        counted as unstable (default 1e-9).

    Returns
    -------
    ndarray (V_g,) of int

    Raises
    ------
    ComputeError
        The winding number did not come out as a whole number (contour too coarse).
    """
    if group.loop_gain.dt is not None:
        raise ComputeError("the Nyquist count here is for continuous loops; digital loops use "
                           "closed-loop eigenvalues")
    out = np.zeros(group.index.size, dtype=int)
    for j in range(group.index.size):
        poles = group.loop_gain.poles[j]
        zeros = group.loop_gain.zeros[j]
        scale = max([1.0] + [abs(x) for x in np.concatenate([poles, zeros])])
        on_axis = np.abs(poles.real) <= axis_tol * np.maximum(1.0, np.abs(poles))
        P = int(np.sum((poles.real > 0) & ~on_axis))
        axis_w = np.unique(np.round(np.abs(poles[on_axis].imag), 12))
        gaps = np.diff(np.concatenate([[0.0], axis_w[axis_w > 0]]))
        eps = 1e-6 * scale if gaps.size == 0 else min(1e-6 * scale, 0.01 * float(np.min(gaps)))

        def F_of(s, _j=j):
            return _F(group, _j, np.asarray(s, dtype=complex))

        w_top = 1e3 * scale
        if group.tau > 0:
            w_top = max(w_top, 10.0 / group.tau)
        for _ in range(12):
            if abs(F_of(np.array([1j * w_top]))[0, 0] - 1.0) < 0.5:
                break
            w_top *= 10.0
        else:
            raise ComputeError("the loop gain does not fall below 0.5 at high frequency; "
                               "cannot close the Nyquist contour")
        segments = []
        start = 0.0
        if axis_w.size and axis_w[0] == 0.0:
            segments.append((lambda t: eps * np.exp(1j * t * np.pi / 2), np.linspace(0, 1, 65)))
            start = eps
        for w0 in axis_w[axis_w > 0]:
            if w0 >= w_top:
                continue
            lo, hi = start, w0 - eps
            segments.append(_axis_segment(lo, hi, points, scale))
            segments.append((lambda t, w0=w0: 1j * w0 + eps * np.exp(1j * np.pi * (t - 0.5)),
                             np.linspace(0, 1, 65)))
            start = w0 + eps
        segments.append(_axis_segment(start, w_top, points, scale))
        vals = np.concatenate([_refine(path, t, F_of, max_refine, max_step)[0]
                               for path, t in segments])
        if np.min(np.abs(vals)) < marginal_tol:
            out[j] = max(1, P)
            continue
        ang = np.unwrap(np.angle(vals))
        total = (ang[-1] - np.angle(vals[-1])) - ang[0]
        Z = P - total / np.pi
        if abs(Z - round(Z)) > 0.05 or round(Z) < 0:
            raise ComputeError(f"Nyquist count came out as {Z:.3f}, not a whole number; "
                               "the loop may be too close to marginal stability")
        out[j] = int(round(Z))
    return out


def _axis_segment(lo: float, hi: float, points: int, scale: float):
    """Segment s = j w for w in [lo, hi], log-spaced with a linear start near 0."""
    floor = 1e-8 * scale
    a = max(lo, floor)
    logw = np.linspace(np.log10(a), np.log10(max(hi, a * (1 + 1e-12))), points)

    def path(t, lo=lo, a=a, hi=hi):
        w = np.where(t < 0, lo + (a - lo) * (t + 1.0), 10.0 ** np.interp(t, [0, 1],
                                                                         [logw[0], logw[-1]]))
        return 1j * w

    t0 = np.concatenate([[-1.0], np.linspace(0.0, 1.0, points)]) if lo < a else \
        np.linspace(0.0, 1.0, points)
    return path, t0


def _continuous_equivalent(poles: np.ndarray, dt) -> np.ndarray:
    """s-plane equivalents ``ln(z) / Ts`` of discrete poles (continuous poles as given).

    A pole at ``z = 0`` (deadbeat) decays infinitely fast: it maps to ``s = -inf`` (real), set
    directly; ``ln(0) / Ts`` in complex arithmetic would give ``-inf + nan j`` and a
    RuntimeWarning.
    """
    if dt is None:
        return poles
    z = np.asarray(poles).astype(complex)
    zero = z == 0
    out = np.full(z.shape, complex(-math.inf, 0.0))
    out[~zero] = np.log(z[~zero]) / dt
    return out


def min_damping(poles: np.ndarray, dt=None) -> float:
    """Smallest damping ratio over closed-loop poles.

    ``zeta = -Re(s) / |s|`` (1.0 for a real stable pole); discrete poles map through
    ``s = ln(z) / Ts`` (``z = 0`` counts as 1.0).  Source: damping ratio of a pole,
    e.g. Ogata, *Modern Control Engineering*, 5th ed., section 5-3.

    Parameters
    ----------
    poles : ndarray
        Closed-loop poles (s-plane, or z-plane when ``dt`` is set).
    dt : float or None
        Sample time, s.

    Returns
    -------
    float
        Dimensionless; 1.0 when there are no poles.
    """
    s = _continuous_equivalent(np.asarray(poles), dt)
    if s.size == 0:
        return 1.0
    with np.errstate(invalid="ignore", divide="ignore"):
        zeta = np.where(np.isinf(s.real), 1.0, -s.real / np.abs(s))
    zeta = np.where(np.abs(s) == 0, 0.0, zeta)
    return float(np.min(zeta))


def min_damping_rows(poles: np.ndarray, dt=None) -> np.ndarray:
    """:func:`min_damping` of every row of ``poles`` (V, n), n >= 1; returns ndarray (V,)."""
    s = _continuous_equivalent(np.asarray(poles), dt)
    with np.errstate(invalid="ignore", divide="ignore"):
        zeta = np.where(np.isinf(s.real), 1.0, -s.real / np.abs(s))
    zeta = np.where(np.abs(s) == 0, 0.0, zeta)
    return np.min(zeta, axis=1).astype(float)


def decay_rate_rows(poles: np.ndarray, dt=None) -> np.ndarray:
    """:func:`decay_rate` of every row of ``poles`` (V, n), n >= 1; returns ndarray (V,)."""
    s = _continuous_equivalent(np.asarray(poles), dt)
    return np.min(-s.real, axis=1).astype(float)


def decay_rate(poles: np.ndarray, dt=None) -> float:
    """Slowest decay rate ``min(-Re s)`` over closed-loop poles, 1/s.

    Discrete poles map through ``s = ln(z) / Ts``; ``z = 0`` decays infinitely fast.
    Returns ``inf`` when there are no poles.
    """
    s = _continuous_equivalent(np.asarray(poles), dt)
    if s.size == 0:
        return math.inf
    return float(np.min(-s.real))


# ----------------------------------------------------------------------------------------------
# rightmost characteristic root of a continuous loop with a delay
# ----------------------------------------------------------------------------------------------

def _cheb(N: int) -> tuple[np.ndarray, np.ndarray]:
    """Chebyshev extremal points ``x_j = cos(j pi / N)`` on [-1, 1] and the differentiation
    matrix on them (Trefethen, *Spectral Methods in MATLAB*, SIAM 2000, program ``cheb``)."""
    x = np.cos(np.pi * np.arange(N + 1) / N)
    c = np.ones(N + 1)
    c[0] = c[-1] = 2.0
    c *= (-1.0) ** np.arange(N + 1)
    X = x[:, None] - x[None, :]
    D = np.outer(c, 1.0 / c) / (X + np.eye(N + 1))
    D -= np.diag(D.sum(axis=1))
    return x, D


def _generator_eigs(A0: np.ndarray, A1: np.ndarray, tau: float, N: int) -> np.ndarray:
    """Eigenvalues of the pseudospectral (Chebyshev collocation) discretisation of the
    infinitesimal generator of ``x'(t) = A0 x(t) + A1 x(t - tau)`` on ``N + 1`` nodes of
    ``[-tau, 0]`` (Breda, Maset and Vermiglio, "Pseudospectral differencing methods for
    characteristic roots of delay differential equations", SIAM J. Sci. Comput. 27, 2005)."""
    n = A0.shape[0]
    _, D = _cheb(N)
    D = D * (2.0 / tau)                       # theta = tau (x - 1) / 2 in [-tau, 0]
    M = np.kron(D, np.eye(n))
    M[:n, :] = 0.0
    M[:n, :n] = A0                            # node 0 is theta = 0: the DDE itself
    M[:n, N * n:] = A1                        # node N is theta = -tau: the delayed state
    return np.linalg.eigvals(M)


def _newton_root(A0, A1, tau, s, *, tol=1e-13, maxiter=60):
    """Newton's method on ``det(s I - A0 - A1 e^{-s tau}) = 0`` from ``s``: the step is
    ``-1 / trace(M(s)^-1 M'(s))`` with ``M' = I + tau A1 e^{-s tau}``.  Returns the root or
    ``None`` when it does not converge."""
    n = A0.shape[0]
    eye = np.eye(n)
    for _ in range(maxiter):
        e = np.exp(-s * tau)
        M = s * eye - A0 - A1 * e
        try:
            t = np.trace(np.linalg.solve(M, eye + tau * A1 * e))
        except np.linalg.LinAlgError:
            return s                           # M singular: s is a root
        if not np.isfinite(t) or t == 0:
            return None
        step = 1.0 / t
        s = s - step
        if abs(step) <= tol * max(1.0, abs(s)):
            return s
    return None


def _count_right_of(A0, Bw, Cz, tau, gamma, *, points=400, max_refine=30, max_step=0.3):
    """Characteristic roots of ``x' = A0 x + Bw Cz x(t - tau)`` with ``Re s > gamma``.

    Argument principle on ``phi(s) = det(sI - A0 - Bw Cz e^{-s tau}) / det(sI - A0)
    = 1 - e^{-s tau} Cz (sI - A0)^-1 Bw`` along ``s = gamma + j w``: ``Z = P - (change of arg
    phi, w: 0 -> inf) / pi`` with ``P`` the eigenvalues of ``A0`` right of the line (the
    Nyquist criterion on a shifted line; phi -> 1 at infinity, the loop being strictly
    proper).  Returns the count, or ``None`` when the winding is not a whole number.
    """
    n = A0.shape[0]
    ev = np.linalg.eigvals(A0) if n else np.zeros(0)
    P = int(np.sum(ev.real > gamma))
    scale = max([1.0, abs(gamma)] + [abs(x) for x in ev])
    eye = np.eye(n)

    def phi(w):
        s = gamma + 1j * np.asarray(w, float)
        M = s[:, None, None] * eye[None] - A0[None]
        g = np.linalg.solve(M, np.broadcast_to(Bw.astype(complex), (s.size, n))[..., None])[..., 0]
        return 1.0 - np.exp(-s * tau) * (g @ Cz)

    w_top = 1e3 * scale
    for _ in range(12):
        if np.all(np.abs(phi(np.array([w_top, 2 * w_top, 4 * w_top])) - 1.0) < 0.5):
            break
        w_top *= 10.0
    else:
        return None
    logw = np.linspace(np.log10(1e-6 * scale), np.log10(w_top), points)
    t = np.concatenate([[0.0], 10.0 ** logw])
    vals = phi(t)
    for _ in range(max_refine):
        d = np.abs(np.angle(vals[1:] / vals[:-1]))
        bad = ~(d < max_step)
        if not np.any(bad):
            break
        t = np.sort(np.concatenate([t, 0.5 * (t[:-1][bad] + t[1:][bad])]))
        vals = phi(t)
    if not np.all(np.isfinite(vals)) or np.min(np.abs(vals)) == 0:
        return None
    ang = np.unwrap(np.angle(vals))
    total = (ang[-1] - np.angle(vals[-1])) - ang[0]
    Z = P - total / np.pi
    if abs(Z - round(Z)) > 0.05 or round(Z) < 0:
        return None
    return int(round(Z))


def rightmost_delayed_root(A: np.ndarray, Bw: np.ndarray, Cz: np.ndarray, Dzw: float,
                           tau: float, *, nodes: int = 32, max_size: int = 2400) -> complex:
    """Rightmost characteristic root of a continuous loop with an internal delay.

    The loop ``x' = A x + Bw w``, ``z = Cz x + Dzw w``, ``w(t) = z(t - tau)`` with ``Dzw = 0``
    is the retarded delay equation ``x'(t) = A x(t) + Bw Cz x(t - tau)``; its characteristic
    roots solve ``det(s I - A - Bw Cz e^{-s tau}) = 0``.  Method:

    1. candidates: eigenvalues of the pseudospectral (Chebyshev) discretisation of the
       infinitesimal generator on ``nodes + 1`` points (Breda, Maset and Vermiglio 2005);
    2. the rightmost candidates are polished by Newton's method on the exact equation (so the
       result does not carry the discretisation error);
    3. check: the argument principle on the line ``Re s = Re s* + delta`` must count no root
       to its right; otherwise the discretisation is refined (doubling ``nodes``) until it
       does, and a :class:`ComputeError` is raised when it never does within ``max_size``
       (matrix order).

    Parameters
    ----------
    A, Bw, Cz : ndarray
        Loop states (n, n), delay input (n,), delay output (n,).
    Dzw : float
        Feedthrough round the loop; must be 0 (a non-zero one makes a neutral delay system,
        with infinitely many roots near ``Re s = ln|Dzw| / tau``).
    tau : float
        Loop delay, s (> 0).

    Returns
    -------
    complex
        The root, 1/s (the one with the larger imaginary part of a conjugate pair); ``-inf``
        when the loop has no states.
    """
    if Dzw != 0:
        raise ComputeError("the loop has direct feedthrough round the delay (a neutral delay "
                           "system, with infinitely many roots near Re s = ln|D|/tau); "
                           "decay_rate is computed for strictly proper loops only: add roll-off")
    n = A.shape[0]
    if n == 0:
        return complex(-math.inf, 0.0)
    A1 = np.outer(Bw, Cz)
    N = nodes
    while n * (N + 1) <= max_size:
        cand = _generator_eigs(A, A1, tau, N)
        cand = cand[np.argsort(-cand.real)]
        roots = []
        for c0 in cand[:min(cand.size, 12)]:
            r = _newton_root(A, A1, tau, complex(c0))
            if r is not None and np.isfinite(r):
                roots.append(r)
        if roots:
            best = max(roots, key=lambda r: (r.real, abs(r.imag)))
            sig = best.real
            delta = 1e-6 * max(1.0, abs(best))
            if _count_right_of(A, Bw, Cz, tau, sig + delta) == 0:
                return complex(sig, abs(best.imag))
        N *= 2
    raise ComputeError("could not locate the rightmost characteristic root of the delayed "
                       f"loop (discretisation up to order {n * (N // 2 + 1)} did not agree with "
                       "the argument-principle count); the loop is too stiff for decay_rate")

