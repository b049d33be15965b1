"""Time grids for exact step responses, chosen from every closed-loop mode.

The grid rule (continuous time, no internal delay)
--------------------------------------------------
Every eigenvalue ``lam`` of ``A`` over every variant is a mode with decay rate
``sigma = -Re(lam)`` (1/s) and natural frequency ``|lam|`` (rad/s).  A mode is *alive* until
``T = settle_factor / sigma`` seconds (by then it has decayed by ``exp(-settle_factor)``, so a
mode with a small residue, e.g. the slow pole of a pole-zero doublet, is still covered: the
horizon follows the slowest mode, whatever its residue).  While a mode is alive the sample step
is at most ``2 pi / (points_per_period |lam|)``, i.e. ``points_per_period`` samples per period of
an oscillatory mode (and about ``points_per_period / 2 pi`` per time constant of a real one).
The step is rounded down to ``h0 * 2**j`` (``h0`` the finest step), so the grid is a short list
of uniform segments whose step doubles as the fast modes die out; the horizon is
``max T`` and never fewer than ``min_samples`` samples are used.  The samples themselves are exact
(zero-order-hold-exact propagation of a constant step), so the grid only decides where extrema
and crossings are bracketed; they are then refined on the exact response.

Discrete time: modes are ``log(z) / dt`` (``z = 0`` is a dead-beat mode that ends after ``n``
samples), the step is ``dt`` and the horizon follows the same ``settle_factor`` rule.

Continuous time with an internal delay ``tau``: the step is ``h = tau / m`` with ``m`` an
integer (method of steps), small enough that ``h |lam| <= (96 delay_rtol)^(1/4)`` for the modes of
``A`` and of the delay-free loop ``A + Bw Cz / (1 - Dzw)`` and for ``1 / tau`` (the cubic Hermite
hold errs by ``(h |lam|)^4 / 384`` of a mode, so this leaves a factor 4 for modes of the delayed
loop faster than those), and ``h <= tau / min_delay_steps``;
the horizon is the same ``settle_factor`` rule over those modes, at least ``settle_factor`` delays
long.  Delayed loops have modes that are not eigenvalues of either matrix, so :func:`simulate`
extends the horizon until the tail has settled.

Exact sampled propagation
-------------------------
:func:`simulate` runs the exact propagation on that grid (zero-order-hold-exact matrix
exponential steps; the difference equation for discrete batches; the cubic-Hermite-hold method
of steps for an internal delay, see ``timeresp``) and returns, for every step ``[t_k, t_{k+1}]``,
the augmented state, end values and slopes and a cubic-Hermite estimate of any interior
extremum.  The refinement and the metrics live in ``timeresp``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ledger.engine.types import SSBatch
from ledger.errors import ComputeError, UnstableLoopError

__all__ = ["TimeGrid", "Pieces", "modes", "check_stable", "horizon", "equilibrium", "simulate",
           "has_delay", "mats", "expm_batch", "balance", "balance_scales"]


@dataclass(frozen=True)
class TimeGrid:
    """A piecewise-uniform sample grid.

    Attributes
    ----------
    t_end : float
        Horizon, seconds (time of the last sample).
    dt : float
        Finest sample step, seconds.
    segments : tuple of (float, int)
        ``(step_s, number_of_steps)`` in time order; the steps never decrease.

    Unpacks as ``t_end, dt = horizon(sys)``.
    """

    t_end: float
    dt: float
    segments: tuple

    def __iter__(self):
        yield self.t_end
        yield self.dt

    @property
    def nsamples(self) -> int:
        """Number of samples including ``t = 0``."""
        return 1 + sum(c for _, c in self.segments)

    @property
    def t(self) -> np.ndarray:
        """Sample times (N,), seconds, starting at 0."""
        parts = [np.zeros(1)]
        t0 = 0.0
        for h, c in self.segments:
            parts.append(t0 + h * np.arange(1, c + 1))
            t0 = t0 + h * c
        return np.concatenate(parts)

    def extended(self, factor: float = 2.0) -> "TimeGrid":
        """The same grid continued with its last step until ``factor * t_end``."""
        h = self.segments[-1][0]
        extra = max(1, int(math.ceil((factor - 1.0) * self.t_end / h)))
        segs = self.segments + ((h, extra),)
        return TimeGrid(t_end=self.t_end + h * extra, dt=self.dt, segments=segs)


def _eigs(A: np.ndarray) -> np.ndarray:
    if A.shape[1] == 0:
        return np.zeros((A.shape[0], 0), dtype=complex)
    return np.linalg.eigvals(A)


def modes(sys: SSBatch) -> np.ndarray:
    """Eigenvalues of ``A`` as continuous-time rates, per variant.

    Parameters
    ----------
    sys : SSBatch

    Returns
    -------
    ndarray (V, n) of complex
        ``s``-plane eigenvalues (1/s).  Discrete systems are mapped by ``log(z) / dt``;
        dead-beat eigenvalues (``z = 0``) map to ``-inf``.
    """
    lam = _eigs(np.asarray(sys.A, dtype=float))
    if sys.dt is None:
        return lam
    with np.errstate(divide="ignore"):
        out = np.where(np.abs(lam) > 0, np.log(np.where(lam == 0, 1, lam)) / sys.dt, -np.inf)
    return out.astype(complex)


def check_stable(sys: SSBatch, *, margin: float = 1e-12) -> None:
    """Raise :class:`UnstableLoopError` unless every eigenvalue of ``A`` is strictly stable.

    Parameters
    ----------
    sys : SSBatch
        Continuous: ``Re(lam) < -margin * max(1, |lam|)``.  Discrete:
        ``|z| < 1 - margin``.  The internal delay channel is not part of this test
        (delayed loops are checked by their response, see ``timeresp``).
    margin : float, default 1e-12
        Relative distance from the stability boundary counted as marginal (dimensionless).
    """
    lam = _eigs(np.asarray(sys.A, dtype=float))
    if lam.size == 0:
        return
    if sys.dt is None:
        bad = lam.real >= -margin * np.maximum(1.0, np.abs(lam))
        where = "in the closed right half plane"
    else:
        bad = np.abs(lam) >= 1.0 - margin
        where = "on or outside the unit circle"
    if np.any(bad):
        v = sorted(set(np.nonzero(bad)[0].tolist()))
        worst = lam[bad][0]
        raise UnstableLoopError(
            f"closed loop is unstable for variant(s) {v[:10]}: eigenvalue {worst:.6g} {where};"
            " a step response has no settled value, fix the design before asking for time metrics")


def _delay_free_A(sys: SSBatch) -> np.ndarray | None:
    Dzw = np.asarray(sys.Dzw, dtype=float) if sys.Dzw is not None else np.zeros(sys.nvar)
    if sys.Bw is None or sys.Cz is None or np.any(np.abs(1.0 - Dzw) < 1e-12):
        return None
    Bw = np.asarray(sys.Bw, dtype=float)
    Cz = np.asarray(sys.Cz, dtype=float)
    return np.asarray(sys.A, dtype=float) + Bw[:, :, None] * Cz[:, None, :] / (1.0 - Dzw)[:, None, None]


def horizon(sys: SSBatch, *, settle_factor: float = 15.0, points_per_period: float = 24.0,
            min_samples: int = 100, max_samples: int = 200_000, delay_rtol: float = 1e-6,
            min_delay_steps: int = 8) -> TimeGrid:
    """Choose the simulation horizon and sample grid from every closed-loop mode.

    Parameters
    ----------
    sys : SSBatch
        Closed-loop batch (continuous, discrete, or continuous with an internal delay).
    settle_factor : float, default 15
        A mode of decay rate ``sigma`` (1/s) is followed for ``settle_factor / sigma`` seconds
        (it has then decayed by ``exp(-15)``, about 3e-7).
    points_per_period : float, default 24
        Samples per period ``2 pi / |lam|`` of every live mode (continuous, no delay).
    min_samples : int, default 100
        Fewest samples over the horizon.
    max_samples : int, default 200000
        Most samples; a wider spread of time scales raises :class:`ComputeError`.
    delay_rtol : float, default 1e-6
        Target relative accuracy of the cubic-Hermite-hold method of steps (delay only):
        ``h |lam| <= (96 delay_rtol)^(1/4)`` (about 0.1 at the default).
    min_delay_steps : int, default 8
        Fewest steps per delay ``tau`` (delay only).

    Returns
    -------
    TimeGrid
        Unpacks as ``(t_end, dt)``: horizon and finest step, seconds.

    Raises
    ------
    UnstableLoopError
        Continuous without delay or discrete, with an eigenvalue that is not strictly stable.
    ComputeError
        The grid would need more than ``max_samples`` samples.
    """
    tau = float(sys.tau or 0.0)
    if sys.dt is not None or tau == 0.0:
        check_stable(sys)
    if sys.dt is not None:
        lam = modes(sys).ravel()
        fin = lam[np.isfinite(lam)]
        n = sys.nstate
        t_end = float(sys.dt) * max(n + 1, min_samples - 1)
        if fin.size:
            t_end = max(t_end, settle_factor / float(np.min(-fin.real)))
        count = int(math.ceil(t_end / sys.dt - 1e-9))
        _cap(count + 1, max_samples, fin)
        return TimeGrid(t_end=count * float(sys.dt), dt=float(sys.dt), segments=((float(sys.dt), count),))

    lam = modes(sys).ravel()
    if tau > 0.0:
        A0 = _delay_free_A(sys)
        if A0 is not None:
            lam = np.concatenate([lam, _eigs(A0).ravel()])
        lam = lam[lam.real < 0]
        rates = np.concatenate([np.abs(lam), [1.0 / tau]])
        h = min(tau / min_delay_steps, (96.0 * delay_rtol) ** 0.25 / float(np.max(rates)))
        m = int(math.ceil(tau / h - 1e-9))
        h = tau / m
        t_end = settle_factor * tau
        if lam.size:
            t_end = max(t_end, settle_factor / float(np.min(-lam.real)) + tau)
        count = int(math.ceil(t_end / h - 1e-9))
        _cap(count + 1, max_samples, lam)
        return TimeGrid(t_end=count * h, dt=h, segments=((h, count),))

    if lam.size == 0:  # static gain: the response is constant from t = 0+
        return TimeGrid(t_end=1.0, dt=1.0, segments=((1.0, 1),))
    sigma = -lam.real
    life = settle_factor / sigma
    hreq = 2.0 * math.pi / (points_per_period * np.abs(lam))
    t_end = float(np.max(life))
    h0 = float(np.min(hreq))
    hcap = t_end / (min_samples - 1)
    if not (np.isfinite(t_end) and h0 > 0):
        raise ComputeError("time grid cannot be built: modes are not finite; check the model")
    level = np.floor(np.log2(hreq / h0) + 1e-12)          # each mode's step level
    cap_level = max(0.0, math.floor(math.log2(hcap / h0) + 1e-12)) if hcap >= h0 else 0.0
    level = np.minimum(level, cap_level)
    segs = []
    t = 0.0
    total = 0
    while t < t_end * (1 - 1e-12):
        alive = life > t * (1 + 1e-12)
        lv = float(np.min(level[alive])) if np.any(alive) else cap_level
        h = h0 * 2.0 ** lv
        same = alive & (level <= lv)
        t_b = float(np.max(life[same])) if np.any(same) else t_end
        count = max(1, int(math.ceil((t_b - t) / h - 1e-9)))
        total += count
        _cap(total + 1, max_samples, lam)
        segs.append((h, count))
        t += h * count
    return TimeGrid(t_end=t, dt=h0, segments=tuple(segs))


def _cap(n: int, max_samples: int, lam: np.ndarray) -> None:
    if n > max_samples:
        if lam.size:
            fast = float(np.max(np.abs(lam)))
            slow = float(np.min(-lam.real))
            why = f"modes span from {fast:.3g} rad/s down to decay rate {slow:.3g} 1/s"
        else:
            why = "the delay needs a very fine step"
        raise ComputeError(
            f"time response needs {n} samples, more than max_samples={max_samples}: {why};"
            " reduce the spread of time scales or raise max_samples")


# --------------------------------------------------------------------------- exact sampled propagation
# Coefficients of the [13/13] Pade approximant of exp and its scaling threshold (Higham, "The
# scaling and squaring method for the matrix exponential revisited", SIAM J. Matrix Anal.
# Appl. 26(4), 2005); checked against scipy.linalg.expm in the tests.
_PADE13 = (64764752532480000.0, 32382376266240000.0, 7771770303897600.0, 1187353796428800.0,
           129060195264000.0, 10559470521600.0, 670442572800.0, 33522128640.0, 1323241920.0,
           40840800.0, 960960.0, 16380.0, 182.0, 1.0)
_THETA13 = 5.371920351148152


def expm_batch(X: np.ndarray) -> np.ndarray:
    """Matrix exponential of a stack ``X (P, m, m)``, vectorised over the stack.

    Scaling and squaring with the [13/13] Pade approximant, one scaling per matrix; the same
    algorithm as ``scipy.linalg.expm`` without its per-matrix Python loop (which dominates
    when P is large and m small).

    Parameters
    ----------
    X : ndarray (P, m, m)

    Returns
    -------
    ndarray (P, m, m)
    """
    X = np.asarray(X, dtype=float)
    P, m = X.shape[0], X.shape[-1]
    if P == 0 or m == 0:
        return np.broadcast_to(np.eye(m), X.shape).copy()
    norm = np.max(np.sum(np.abs(X), axis=-2), axis=-1)
    with np.errstate(divide="ignore"):
        sq = np.where(norm > _THETA13, np.ceil(np.log2(norm / _THETA13)), 0.0).astype(int)
    A = X / (2.0 ** sq)[:, None, None]
    b = _PADE13
    eye = np.broadcast_to(np.eye(m), A.shape)
    A2 = A @ A
    A4 = A2 @ A2
    A6 = A4 @ A2
    U = A @ (A6 @ (b[13] * A6 + b[11] * A4 + b[9] * A2)
             + b[7] * A6 + b[5] * A4 + b[3] * A2 + b[1] * eye)
    Vm = (A6 @ (b[12] * A6 + b[10] * A4 + b[8] * A2)
          + b[6] * A6 + b[4] * A4 + b[2] * A2 + b[0] * eye)
    R = np.linalg.solve(Vm - U, Vm + U)
    for j in range(int(sq.max(initial=0))):
        more = sq > j
        R[more] = R[more] @ R[more]
    return R


# --------------------------------------------------------------------------- matrices
def mats(sys: SSBatch):
    """``A (V,n,n), B (V,n), C (V,n), D (V,)`` as float arrays; ComputeError on NaN or inf."""
    A = np.asarray(sys.A, dtype=float)
    V, n = A.shape[0], A.shape[1]
    B = np.asarray(sys.B, dtype=float).reshape(V, n)
    C = np.asarray(sys.C, dtype=float).reshape(V, n)
    D = np.asarray(sys.D, dtype=float).reshape(V)
    for name, arr in (("A", A), ("B", B), ("C", C), ("D", D)):
        if not np.all(np.isfinite(arr)):
            raise ComputeError(f"matrix {name} of the closed loop holds NaN or inf; check the model")
    return A, B, C, D


def _channel(sys: SSBatch):
    V, n = sys.nvar, sys.nstate

    def get(x, shape):
        return np.zeros(shape) if x is None else np.asarray(x, dtype=float).reshape(shape)

    return (get(sys.Bw, (V, n)), get(sys.Cz, (V, n)), get(sys.Dz, (V,)),
            get(sys.Dw, (V,)), get(sys.Dzw, (V,)))


def balance_scales(M: np.ndarray) -> np.ndarray:
    """Balancing scales (powers of 2) of a stack of square matrices ``M (V, m, m)``.

    ``scipy.linalg.matrix_balance`` (no permutation) of one matrix per pattern of binary
    exponents and zero entries, applied to every matrix with that pattern (the variants of a
    family mostly share a few patterns).  Any power-of-2 diagonal similarity is exact, so the
    choice only affects conditioning, never the transfer function.

    Returns
    -------
    ndarray (V, m)
        ``T`` with ``T^-1 M T`` balanced (``M * T[:, None, :] / T[:, :, None]``).
    """
    import scipy.linalg

    M = np.asarray(M, dtype=float)
    V, m = M.shape[0], M.shape[-1]
    key = np.where(M == 0.0, -4096, np.frexp(M)[1]).reshape(V, -1)
    _, first, inv = np.unique(key, axis=0, return_index=True, return_inverse=True)
    T = np.empty((first.size, m))
    for g, j in enumerate(first):
        T[g] = scipy.linalg.matrix_balance(M[j], permute=False, separate=True)[1][0]
    return T[np.ravel(inv)]


def balance(sys: SSBatch) -> SSBatch:
    """The same batch in diagonally rescaled state coordinates (powers of 2, no rounding).

    ``A -> T^-1 A T, B -> T^-1 B, C -> C T`` (and ``Bw, Cz`` alike) with ``T`` from
    ``scipy.linalg.matrix_balance``, so that ``||A||`` is close to the largest ``|lam|``.
    Realisations from polynomial coefficients can have entries 1e9 apart; without this the
    matrix exponential of ``M h`` needs many squarings and loses accuracy.  Outputs and
    eigenvalues are unchanged.
    """
    from dataclasses import replace

    A = np.asarray(sys.A, dtype=float)
    V, n = A.shape[0], A.shape[1]
    if n < 2:
        return sys
    T = balance_scales(A)
    out = dict(A=A * T[:, None, :] / T[:, :, None],
               B=np.asarray(sys.B, dtype=float).reshape(V, n) / T,
               C=np.asarray(sys.C, dtype=float).reshape(V, n) * T)
    if sys.Bw is not None:
        out["Bw"] = np.asarray(sys.Bw, dtype=float).reshape(V, n) / T
    if sys.Cz is not None:
        out["Cz"] = np.asarray(sys.Cz, dtype=float).reshape(V, n) * T
    return replace(sys, **out)


def has_delay(sys: SSBatch) -> bool:
    """True for a continuous batch with an internal delay ``tau > 0``."""
    return sys.dt is None and float(sys.tau or 0.0) > 0.0


# --------------------------------------------------------------------------- final value
def equilibrium(sys: SSBatch, amplitude: float, singular_rcond: float):
    """Equilibrium for a constant input ``amplitude`` (input units).

    Returns ``(x_ss (V,n), w_ss (V,), y_ss (V,))``; raises :class:`ComputeError` when the
    equilibrium matrix has reciprocal condition number below ``singular_rcond``.
    """
    A, B, C, D = mats(sys)
    V, n = A.shape[0], A.shape[1]
    u = float(amplitude)
    Aeq = A - np.eye(n) if sys.dt is not None else A
    delay = has_delay(sys)
    if delay:
        Bw, Cz, Dz, Dw, Dzw = _channel(sys)
        Meq = np.zeros((V, n + 1, n + 1))
        Meq[:, :n, :n] = Aeq
        Meq[:, :n, n] = Bw
        Meq[:, n, :n] = Cz
        Meq[:, n, n] = Dzw - 1.0
        rhs = -np.concatenate([B, Dz[:, None]], axis=1) * u
    else:
        Meq, rhs = Aeq, -B * u
    if Meq.shape[1] > 0:
        sv = np.linalg.svd(Meq, compute_uv=False)
        rc = np.where(sv[:, 0] > 0, sv[:, -1] / np.where(sv[:, 0] > 0, sv[:, 0], 1.0), 0.0)
        bad = rc < singular_rcond
        if np.any(bad):
            idx = np.nonzero(bad)[0].tolist()
            raise ComputeError(
                f"equilibrium is singular for variant(s) {idx[:10]} (reciprocal condition"
                f" {float(rc[bad][0]):.2e}): the output integrates a step (pole at"
                f" {'z=1' if sys.dt is not None else 's=0'}), so there is no final value;"
                " use a path without a free integrator")
        sol = np.linalg.solve(Meq, rhs[:, :, None])[:, :, 0]
    else:
        sol = np.zeros((V, 0))
    x = sol[:, :n]
    if delay:
        w = sol[:, n]
        y = np.einsum("vi,vi->v", C, x) + D * u + Dw * w
    else:
        w = np.zeros(V)
        y = np.einsum("vi,vi->v", C, x) + D * u
    return x, w, y


# --------------------------------------------------------------------------- simulation
@dataclass(frozen=True)
class Pieces:
    """Exact response on each grid step ``[t_k, t_{k+1}]``, made by :func:`simulate`.

    On step ``k``: ``y(t_k + s) = Cy expm(M s) Z0[:, k]`` for ``0 <= s <= t_{k+1} - t_k``.
    Times in seconds without ``io_delay``; outputs in output units.
    """

    t: np.ndarray          # (N,) sample times, no io_delay
    M: np.ndarray          # (V, m, m) augmented generator
    Cy: np.ndarray         # (V, m) augmented output row
    Z0: np.ndarray         # (V, N-1, m) augmented state at the start of each step
    ya: np.ndarray         # (V, N-1) y at t_k (right limit)
    yb: np.ndarray         # (V, N-1) y at t_{k+1} (left limit)
    te: np.ndarray         # (V, N-1) time of the interior extremum, NaN if none
    ye: np.ndarray         # (V, N-1) its value (an estimate until refined, see timeresp)
    final: np.ndarray      # (V,)
    io_delay: float
    discrete: bool
    da: np.ndarray | None = None     # (V, N-1) y' at t_k (right limit)
    db: np.ndarray | None = None     # (V, N-1) y' at t_{k+1} (left limit)
    exact: np.ndarray | None = None  # (V, N-1) True where te, ye are refined (or absent)


def _propagate(E: np.ndarray, out: np.ndarray) -> None:
    """Fill ``out[:, k] = E^k out[:, 0]`` for k >= 1, in blocks of powers: out (V, K+1, m)."""
    V, K1, m = out.shape
    nsteps = K1 - 1
    if nsteps <= 0:
        return
    b = max(1, min(nsteps, int(math.sqrt(nsteps)) + 1))
    P = np.empty((V, b, m, m))
    P[:, 0] = E
    for j in range(1, b):
        P[:, j] = P[:, j - 1] @ E
    k = 0
    while k < nsteps:
        j = min(b, nsteps - k)
        # one (j m, m) @ (m, 1) product per variant (rows of all j powers stacked)
        out[:, k + 1:k + 1 + j] = (P[:, :j].reshape(V, j * m, m)
                                   @ out[:, k, :, None]).reshape(V, j, m)
        k += j


#: the last delay-free propagation: ((dt, u, grid segments, A, B), states); read-only states
_LAST_PROPAGATION: list = [None]


def _sim_nodelay(sys: SSBatch, u: float, grid: TimeGrid):
    A, B, C, D = mats(sys)
    V, n = A.shape[0], A.shape[1]
    M = np.zeros((V, n + 1, n + 1))
    M[:, :n, :n] = A
    M[:, :n, n] = B
    Cy = np.concatenate([C, D[:, None]], axis=1)
    # the states depend on (A, B, u, grid) only: paths that share them (r->y and r->u of one
    # loop) share one propagation
    key = (sys.dt, u, tuple(grid.segments), A.shape, A.tobytes(), B.tobytes())
    last = _LAST_PROPAGATION[0]
    if last is not None and last[0] == key:
        Z = last[1]
    else:
        Z = np.empty((V, grid.nsamples, n + 1))             # augmented states at the samples
        Z[:, 0, :n] = 0.0
        Z[:, 0, n] = u
        k = 0
        for h, count in grid.segments:
            if sys.dt is not None:
                E = np.zeros_like(M)
                E[:, :n, :n] = A
                E[:, :n, n] = B
                E[:, n, n] = 1.0
            else:
                E = expm_batch(M * h)
            _propagate(E, Z[:, k:k + count + 1])
            k += count
        Z.flags.writeable = False
        _LAST_PROPAGATION[0] = (key, Z)
    if sys.dt is not None:
        y = (Z @ Cy[:, :, None])[..., 0]
        return M, Cy, Z[:, :-1], y[:, :-1], y[:, 1:], None, None, Z[:, -1, :n]
    W = np.stack([Cy, np.einsum("vm,vmk->vk", Cy, M)], axis=2)     # (V, m, 2): y and y'
    yd = Z @ W
    y, dy = yd[..., 0], yd[..., 1]
    return M, Cy, Z[:, :-1], y[:, :-1], y[:, 1:], dy[:, :-1], dy[:, 1:], Z[:, -1, :n]


def _hermite_matrix(L: int, h: float) -> np.ndarray:
    """Map from ``[wR, wL, w'R, w'L]`` at ``L + 1`` points to ``p0..p3`` of the ``L`` steps.

    Returns ndarray ``(4 L, 4 (L + 1))``; ``p`` of step ``i`` are the value and first three
    derivatives at its start of the cubic with end values ``wR_i, wL_{i+1}`` and end slopes
    ``w'R_i, w'L_{i+1}`` (cubic Hermite interpolation).
    """
    H = np.zeros((L, 4, L + 1, 4))
    i = np.arange(L)
    H[i, 0, i, 0] = 1.0                                  # p0 = w0
    H[i, 1, i, 2] = 1.0                                  # p1 = d0
    # p2 = 2 (3 (w1 - w0) / h^2 - (2 d0 + d1) / h)
    H[i, 2, i + 1, 1] = 6.0 / h ** 2
    H[i, 2, i, 0] = -6.0 / h ** 2
    H[i, 2, i, 2] = -4.0 / h
    H[i, 2, i + 1, 3] = -2.0 / h
    # p3 = 6 ((d0 + d1) / h^2 - 2 (w1 - w0) / h^3)
    H[i, 3, i, 2] = 6.0 / h ** 2
    H[i, 3, i + 1, 3] = 6.0 / h ** 2
    H[i, 3, i + 1, 1] = -12.0 / h ** 3
    H[i, 3, i, 0] = 12.0 / h ** 3
    return H.reshape(4 * L, 4 * (L + 1))


def _sim_delay(sys: SSBatch, u: float, grid: TimeGrid, *, block: int = 16):
    """Method of steps with a cubic Hermite hold of the delayed signal (see ``timeresp``).

    Propagates blocks of at most ``min(lag, block)`` steps, each by one precomputed linear
    map from (state at the block start, delayed-signal values and slopes) to (states, values
    and slopes of ``z`` at the block's steps).
    """
    A, B, C, D = mats(sys)
    Bw, Cz, Dz, Dw, Dzw = _channel(sys)
    V, n = A.shape[0], A.shape[1]
    h = grid.segments[0][0]
    count = sum(c for _, c in grid.segments)
    tau = float(sys.tau)
    lag = int(round(tau / h))
    if lag < 1 or abs(lag * h - tau) > 1e-9 * tau:
        raise ComputeError(f"delay step h={h:g} s does not divide tau={tau:g} s; use horizon()")
    # Z = [x; u; p0; p1; p2; p3]: w(t_k + s) = p0 + p1 s + p2 s^2 / 2 + p3 s^3 / 6 is made by
    # the chain of integrators p0' = p1, p1' = p2, p2' = p3, p3' = 0.
    m = n + 5
    M = np.zeros((V, m, m))
    M[:, :n, :n] = A
    M[:, :n, n] = B
    M[:, :n, n + 1] = Bw
    M[:, n + 1, n + 2] = 1.0
    M[:, n + 2, n + 3] = 1.0
    M[:, n + 3, n + 4] = 1.0
    Cy = np.concatenate([C, D[:, None], Dw[:, None], np.zeros((V, 3))], axis=1)
    E = expm_batch(M * h)[:, :n, :]                         # (V, n, m)
    Ex, Eu, Ep = E[:, :, :n], E[:, :, n] * u, E[:, :, n + 1:]
    CzA = np.einsum("vi,vij->vj", Cz, A)
    CzBu = np.einsum("vi,vi->v", Cz, B) * u
    CzBw = np.einsum("vi,vi->v", Cz, Bw)
    L = min(lag, block)
    N = count + 1
    # q[:, lag + k] = (zR, zL, z'R, z'L) at t_k, so q[:, k] = (wR, wL, w'R, w'L) at t_k
    # (zero history before t = 0).
    q = np.zeros((V, N + lag, 4))
    q[:, lag, 0] = Dz * u
    q[:, lag, 2] = CzBu
    x = np.zeros((V, N, n))
    # One block of L steps from t_k0:
    #   x_{k0+i} = Ex^i x_k0 + sum_{l<i} Ex^(i-1-l) (Eu + Ep p_l),  p = H w,  i = 1..L,
    #   (zR, zL, z'R, z'L)_{k0+i} = Kx x_{k0+i} + Kw w_{k0+i} + kc.
    pw = np.empty((V, L + 1, n, n))                          # Ex^0 .. Ex^L
    pw[:, 0] = np.eye(n)
    for i in range(1, L + 1):
        pw[:, i] = pw[:, i - 1] @ Ex
    ii, ll = np.meshgrid(np.arange(L), np.arange(L), indexing="ij")
    toe = np.where((ll <= ii)[None, :, :, None, None], pw[:, np.clip(ii - ll, 0, L)], 0.0)
    Gx = pw[:, 1:].reshape(V, L * n, n)
    Gp = (toe @ Ep[:, None, None]).transpose(0, 1, 3, 2, 4).reshape(V, L * n, L * 4)
    Gc = (toe @ Eu[:, None, None, :, None]).sum(axis=2).reshape(V, L * n)
    Gw = Gp @ _hermite_matrix(L, h)                          # (V, L n, 4 (L + 1))
    Kx1 = np.zeros((V, 4, n))
    Kx1[:, 0] = Kx1[:, 1] = Cz
    Kx1[:, 2] = Kx1[:, 3] = CzA
    Kw1 = np.zeros((V, 4, 4))
    Kw1[:, 0, 0] = Kw1[:, 1, 1] = Dzw
    Kw1[:, 2, 0] = Kw1[:, 3, 1] = CzBw
    Kw1[:, 2, 2] = Kw1[:, 3, 3] = Dzw
    kc1 = np.stack([Dz * u, Dz * u, CzBu, CzBu], axis=1)     # (V, 4)
    Kx = np.zeros((V, L * 4, L * n))
    Kw = np.zeros((V, L * 4, 4 * (L + 1)))
    for i in range(L):
        Kx[:, 4 * i:4 * i + 4, n * i:n * i + n] = Kx1
        Kw[:, 4 * i:4 * i + 4, 4 * (i + 1):4 * (i + 2)] = Kw1
    # rows: x (L n) then z values (4 L); columns: x_k0 (n) then w at k0..k0+L (4 (L + 1))
    G = np.concatenate([np.concatenate([Gx, Gw], axis=2),
                        np.concatenate([Kx @ Gx, Kx @ Gw + Kw], axis=2)], axis=1)
    c = np.concatenate([Gc, (Kx @ Gc[:, :, None])[..., 0] + np.tile(kc1, (1, L))], axis=1)
    for k0 in range(0, N - 1, L):
        Lb = min(L, N - 1 - k0)
        if Lb == L:
            Gb, cb = G, c
        else:
            rows = np.concatenate([np.arange(Lb * n), L * n + np.arange(4 * Lb)])
            Gb, cb = G[:, rows, :n + 4 * (Lb + 1)], c[:, rows]
        rhs = np.concatenate([x[:, k0], q[:, k0:k0 + Lb + 1].reshape(V, 4 * (Lb + 1))], axis=1)
        out = (Gb @ rhs[:, :, None])[..., 0] + cb
        x[:, k0 + 1:k0 + Lb + 1] = out[:, :Lb * n].reshape(V, Lb, n)
        q[:, lag + k0 + 1:lag + k0 + Lb + 1] = out[:, Lb * n:].reshape(V, Lb, 4)
    w = q[:, :N]                                             # (V, N, 4): wR, wL, w'R, w'L
    P = np.concatenate([w[:, :-1], w[:, 1:]], axis=2) @ _hermite_matrix(1, h).T   # (V, N-1, 4)
    uu = np.full((V, N - 1, 1), u)
    Z0 = np.concatenate([x[:, :-1], uu, P], axis=2)
    P1 = np.stack([w[:, 1:, 1], w[:, 1:, 3], P[:, :, 2] + h * P[:, :, 3], P[:, :, 3]], axis=2)
    Z1 = np.concatenate([x[:, 1:], uu, P1], axis=2)
    CyM = np.einsum("vm,vmk->vk", Cy, M)
    ya = (Z0 @ Cy[:, :, None])[..., 0]
    yb = (Z1 @ Cy[:, :, None])[..., 0]
    da = (Z0 @ CyM[:, :, None])[..., 0]
    db = (Z1 @ CyM[:, :, None])[..., 0]
    return M, Cy, Z0, ya, yb, da, db, (x, q[:, lag:, 0])


def _settled(yb, yf, yscale, tail_rtol, window, t):
    """True when ``|y - yf|`` stayed below ``tail_rtol * yscale`` over the last ``window`` steps.

    The window is at least a tenth of the horizon (1.5 time constants of the slowest mode
    with the default grid), so a slow mode cannot hide in it behind a zero crossing.
    """
    late = int(np.count_nonzero(t[-yb.shape[1]:] >= 0.9 * t[-1]))
    w = min(yb.shape[1], max(window, late, 20))
    dev = np.max(np.abs(yb[:, -w:] - yf[:, None]), axis=1)
    return bool(np.all(dev <= tail_rtol * yscale))


def simulate(sys: SSBatch, amplitude: float, *, tail_rtol: float, max_samples: int,
              singular_rcond: float = 1e-12, **grid_kw) -> Pieces:
    """Exact step response of every variant on the grid of :func:`horizon`.

    Parameters
    ----------
    sys : SSBatch
    amplitude : float
        Step amplitude, input units.
    tail_rtol : float
        The horizon is doubled until ``|y - yf|`` stays below ``tail_rtol`` times the largest
        ``|y|`` over the last tenth of the horizon (and, with a delay, the last two delays;
        the delayed signal ``z`` is checked the same way).
    max_samples : int
        Bound on the samples; beyond it :class:`ComputeError` (no delay) or
        :class:`UnstableLoopError` (delay: the loop did not settle).
    singular_rcond : float, default 1e-12
        See :func:`equilibrium`.
    **grid_kw
        Passed to :func:`horizon`.

    Returns
    -------
    Pieces
    """
    u = float(amplitude)
    sys = balance(sys)
    xss, wss, yf = equilibrium(sys, u, singular_rcond)
    delay = has_delay(sys)
    grid = horizon(sys, max_samples=max_samples, **grid_kw)
    while True:
        if delay:
            M, Cy, Z0, ya, yb, da, db, tail = _sim_delay(sys, u, grid)
        else:
            M, Cy, Z0, ya, yb, da, db, _ = _sim_nodelay(sys, u, grid)
        yscale = np.maximum(np.maximum(np.max(np.abs(ya), axis=1), np.abs(yb[:, -1])), np.abs(yf))
        yscale = np.where(yscale > 0, yscale, 1.0)
        if delay:
            lag = int(round(float(sys.tau) / grid.dt))
            _, zR = tail
            zscale = np.max(np.abs(zR), axis=1)
            ok = (_settled(yb, yf, yscale, tail_rtol, 2 * lag + 1, grid.t)
                  and _settled(zR[:, 1:], wss, np.where(zscale > 0, zscale, 1.0), tail_rtol,
                               2 * lag + 1, grid.t))
        else:
            ok = sys.nstate == 0 or _settled(yb, yf, yscale, tail_rtol, 0, grid.t)
        if ok:
            break
        nxt = grid.extended(2.0)
        if nxt.nsamples > max_samples:
            msg = (f"step response has not settled after {grid.t_end:.6g} s"
                   f" ({grid.nsamples} samples, max_samples={max_samples})")
            if delay:
                raise UnstableLoopError(msg + "; the delayed loop is probably unstable or too"
                                        " lightly damped: check its margins")
            raise ComputeError(msg + "; raise max_samples")
        grid = nxt
    t = grid.t
    Vn, K = ya.shape
    te = np.full((Vn, K), np.nan)
    ye = np.full((Vn, K), np.nan)
    exact = np.ones((Vn, K), dtype=bool)
    if da is not None:
        vi, ki = np.nonzero(da * db < 0)
        if vi.size:
            h = np.diff(t)[ki]
            se, ve = _hermite_extremum(ya[vi, ki], yb[vi, ki], da[vi, ki], db[vi, ki], h)
            te[vi, ki] = t[ki] + se
            ye[vi, ki] = ve
            exact[vi, ki] = False
    return Pieces(t=t, M=M, Cy=Cy, Z0=Z0, ya=ya, yb=yb, te=te, ye=ye, final=yf,
                   io_delay=float(sys.io_delay or 0.0), discrete=sys.dt is not None,
                   da=da, db=db, exact=exact)


def _hermite_extremum(y0, y1, d0, d1, h):
    """Estimate of the interior extremum of the cubic Hermite interpolant (d0 d1 < 0)."""
    dd = (y1 - y0) / h
    c2 = (3 * dd - 2 * d0 - d1) / h
    c3 = (d0 + d1 - 2 * dd) / h ** 2
    disc = np.maximum(c2 * c2 - 3 * c3 * d0, 0.0)
    q = -(c2 + np.where(c2 >= 0, 1.0, -1.0) * np.sqrt(disc))
    with np.errstate(divide="ignore", invalid="ignore"):
        r1 = q / (3 * c3)
        r2 = d0 / q
    sec = h * d0 / (d0 - d1)
    s = np.where((r2 > 0) & (r2 < h), r2, np.where((r1 > 0) & (r1 < h), r1, sec))
    s = np.where(np.isfinite(s), s, sec)
    return s, y0 + s * (d0 + s * (c2 + s * c3))
