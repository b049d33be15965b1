"""Time grids for exact step responses, chosen from every closed-loop mode.

The grid rule (continuous time, no internal delay)
--------------------------------------------------
Every eigenvalue ``lam`` of ``A`` over every variant is a mode with decay rate
``sigma = -Re(lam)`` (1/s) and natural frequency ``|lam|`` (rad/s).  A mode is *alive* until
``T = settle_factor / sigma`` seconds (by then it has decayed by ``exp(-settle_factor)``, so a
mode with a small residue, e.g. the slow pole of a pole-zero doublet, is still covered: the
horizon follows the slowest mode, whatever its residue).  A mode sets the sample step for a
shorter time when its share of the response is small: until its modal residue times
``exp(-sigma t)`` falls below ``residue_rtol`` (1e-10) of the response's scale, never longer
than ``T`` (:func:`residue_lives`; a structural mode far above the crossover often has a
residue of 1e-13 and would otherwise be sampled 24 times per period for 15 time constants).
While a mode sets the step, the step is at most ``2 pi / (points_per_period |lam|)``, i.e.
``points_per_period`` samples per period of an oscillatory mode (and about
``points_per_period / 2 pi`` per time constant of a real one).
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

The matrices live in :mod:`ledger.engine.ssbatch` (their names are reachable from here too) and
the simulation in :mod:`ledger.engine.simulation`, which imports this module.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ledger.engine.ssbatch import (_PADE13, _THETA13, _channel, balance,  # noqa: F401
                                   balance_scales, equilibrium, expm_batch, has_delay, mats)
from ledger.engine.types import SSBatch
from ledger.errors import ComputeError, UnstableLoopError

# ``Pieces`` and ``simulate`` live in ledger.engine.simulation (which imports this module)
__all__ = ["TimeGrid", "modes", "check_stable", "horizon", "residue_lives", "equilibrium",
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


def check_stable(sys: SSBatch, *, margin: float = 1e-12, lam: np.ndarray | None = None) -> None:
    """Raise :class:`UnstableLoopError` unless every eigenvalue of ``A`` is strictly stable.

    Parameters
    ----------
    sys : SSBatch
        Continuous: ``Re(lam) < -margin * max(1, |lam|)``.  Discrete:
        ``|z| < 1 - margin``.  The internal delay channel is not part of this test
        (delayed loops are checked by their response, see ``timeresp``).
    margin : float, default 1e-12
        Relative distance from the stability boundary counted as marginal (dimensionless).
    lam : ndarray (V, n), optional
        The eigenvalues of ``A`` when the caller has them already.
    """
    if lam is None:
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


def residue_lives(sys: SSBatch, lam: np.ndarray, vecs: np.ndarray, *, settle_factor: float,
                  residue_rtol: float) -> np.ndarray:
    """How long each mode's share of the step response stays above ``residue_rtol`` of it.

    The step response from rest is ``y(t) = y_ss + sum_i r_i exp(lam_i t)`` with the modal
    residue ``r_i = (C v_i) (w_i^T (0 - x_ss))`` (``v_i``, ``w_i^T`` the right and left
    eigenvectors).  Mode ``i`` is followed for
    ``min(settle_factor, max(0, ln(b_i / (residue_rtol s)))) / sigma_i`` seconds, where
    ``s = max(|y_ss|, |y(0+)|)`` is at most ``max |y|`` and ``b_i`` is ``|r_i|`` plus an
    allowance for its rounding, ``1000 eps kappa_i ||C|| ||x_ss||`` with
    ``kappa_i = ||v_i|| ||w_i||`` the eigenvalue's condition number.  So a mode is never
    followed longer than by the ``settle_factor`` rule, and it stops setting the sample step
    once its share of ``y`` is below ``residue_rtol s`` for good.  The outputs are the
    batch's own and those of ``sys.grid_rows`` (the longest life of each mode over them).  A
    variant whose residues cannot be trusted (singular eigenvector matrix, ``s = 0``,
    anything not finite) keeps the ``settle_factor`` rule for that mode.

    Parameters
    ----------
    sys : SSBatch
        Continuous, no internal delay.
    lam, vecs : ndarray (V, n), (V, n, n)
        Eigenvalues and right eigenvectors of ``A`` (``numpy.linalg.eig``).
    settle_factor, residue_rtol : float
        See :func:`horizon`.

    Returns
    -------
    ndarray (V, n)
        Seconds per mode.
    """
    A, B, C, D = mats(sys)
    V, n = A.shape[0], A.shape[1]
    sigma = -lam.real
    old = settle_factor / sigma
    rows = np.concatenate([C, D[:, None]], axis=1)[:, None, :]           # (V, 1, n + 1)
    extra = sys.grid_rows
    if extra is not None and extra.shape[0] == V and extra.shape[2] == n + 1:
        rows = np.concatenate([rows, np.asarray(extra, dtype=float)], axis=1)
    Cr, Dr = rows[:, :, :n], rows[:, :, n]
    with np.errstate(all="ignore"):
        try:
            W = np.linalg.inv(vecs)
            xss = -np.linalg.solve(A, B[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            return old
        c = np.einsum("vij,vj->vi", W, -xss)                   # modal coordinates of x0 - x_ss
        r = np.einsum("vkj,vji->vki", Cr, vecs) * c[:, None, :]             # (V, k, n)
        kappa = np.linalg.norm(vecs, axis=1) * np.linalg.norm(W, axis=2)   # (V, n)
        floor = (1e3 * np.finfo(float).eps * kappa[:, None, :]
                 * (np.linalg.norm(Cr, axis=2) * np.linalg.norm(xss, axis=1)[:, None])[:, :, None])
        bound = np.abs(r) + floor
        yss = np.einsum("vkj,vj->vk", Cr, xss) + Dr
        scale = np.maximum(np.abs(yss), np.abs(Dr))                          # (V, k)
        decades = np.log(bound / (residue_rtol * scale[:, :, None]))
        life = np.clip(decades, 0.0, settle_factor) / sigma[:, None, :]
    trust = (np.isfinite(scale) & (scale > 0))[:, :, None] & np.isfinite(life)
    return np.max(np.where(trust, life, old[:, None, :]), axis=1)


def horizon(sys: SSBatch, *, settle_factor: float = 15.0, points_per_period: float = 24.0,
            min_samples: int = 100, max_samples: int = 200_000, delay_rtol: float = 1e-6,
            min_delay_steps: int = 8, residue_rtol: float | None = 1e-10) -> TimeGrid:
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
    residue_rtol : float or None, default 1e-10
        Continuous, no delay: a mode stops setting the sample step once its share of the
        response is below ``residue_rtol`` times the response's scale (see
        :func:`residue_lives`); the horizon still follows every mode by the ``settle_factor``
        rule.  ``None``: every mode sets the step for its whole ``settle_factor`` life.

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
    lam2 = vecs = None
    if sys.dt is None and tau == 0.0 and sys.nstate > 0:
        lam2, vecs = np.linalg.eig(np.asarray(sys.A, dtype=float))
    if sys.dt is not None or tau == 0.0:
        check_stable(sys, lam=lam2)
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

    lam = lam2.ravel() if lam2 is not None else modes(sys).ravel()
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
    life = settle_factor / sigma                           # decides the horizon
    if residue_rtol is not None:                           # decides the step
        step_life = residue_lives(sys, lam2, vecs, settle_factor=settle_factor,
                                  residue_rtol=residue_rtol).ravel()
    else:
        step_life = life
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
        alive = step_life > t * (1 + 1e-12)
        lv = float(np.min(level[alive])) if np.any(alive) else cap_level
        h = h0 * 2.0 ** lv
        same = alive & (level <= lv)
        t_b = float(np.max(step_life[same])) if np.any(same) else t_end
        count = max(1, int(math.ceil((t_b - t) / h - 1e-9)))
        total += count
        _cap(total + 1, max_samples, lam)
        segs.append((h, count))
        t += h * count
    return TimeGrid(t_end=t, dt=min(h for h, _ in segs), segments=tuple(segs))


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
