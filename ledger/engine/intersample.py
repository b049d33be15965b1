"""The continuous output of a sampled-data loop: the plant between the sample instants.

A digital loop's time metrics are read at the sample instants (the discrete closed loop of
:mod:`ledger.engine.loop`).  Between them the plant runs on the held controller output.  This
module computes that continuous output exactly:

1. the controller output ``u[k]`` for a step on the reference comes from the discrete closed
   loop's ``r -> u`` path (every loop filter and delay included);
2. the plant input is ``v(t) = u[k]`` for ``k T + theta <= t < (k + 1) T + theta``, with
   ``theta`` = input delay + the variant's own delay + computation delay x T (zero before
   the first step reaches the plant);
3. the continuous plant ``x' = A x + B v, y = C x + D v`` is propagated over every
   sub-interval on which ``v`` is constant with its own matrix exponential
   (``exp([[A, B], [0, 0]] h)``), so ``y`` is exact at every point of the fine grid
   (``substeps`` points per sample, plus the instants where ``v`` changes).

``intersample_ripple`` (docs/metrics.md) is read from it: after the loop has settled on the
sample instants, the largest distance between ``y(t)`` and the straight line through the two
neighbouring sample values, in % of ``|y_final|``.  It shows a ripple the samples hide (a
plant mode near a multiple of the sampling frequency).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from ..errors import ComputeError

__all__ = ["ContinuousStep", "continuous_output", "continuous_step", "ripple", "step_values",
           "SUBSTEPS"]

#: fine-grid points per sample interval
SUBSTEPS = 32


@dataclass(frozen=True)
class ContinuousStep:
    """The plant output of one variant for a step on r: fine times ``t`` and values ``y``;
    ``t_samples``/``y_samples`` at the sample instants ``k T``; ``final`` the final value."""

    t: np.ndarray
    y: np.ndarray
    t_samples: np.ndarray
    y_samples: np.ndarray
    final: float


def _plant_ss(system):
    import control

    s = control.ss(system)
    A = np.asarray(s.A, dtype=float)
    B = np.asarray(s.B, dtype=float).reshape(-1)
    C = np.asarray(s.C, dtype=float).reshape(-1)
    D = float(np.asarray(s.D, dtype=float).reshape(-1)[0])
    return A, B, C, D


def continuous_output(system, u: np.ndarray, sample_time: float, theta: float, *,
                      substeps: int = SUBSTEPS) -> tuple[np.ndarray, np.ndarray]:
    """Exact output of the continuous plant ``system`` driven by the held sequence ``u``.

    Parameters
    ----------
    system : control.LTI
        Continuous SISO plant (without its delay).
    u : ndarray (N,)
        Held values, ``u[k]`` from ``k T + theta`` to ``(k + 1) T + theta``.
    sample_time : float
        T, s.
    theta : float
        Delay from the controller output to the plant input, s (>= 0).
    substeps : int
        Fine points per sample interval.

    Returns
    -------
    t, y : ndarray
        Times from 0 to ``N T`` (step ``T / substeps``) and the plant output there.
    """
    A, B, C, D = _plant_ss(system)
    n = A.shape[0]
    T = float(sample_time)
    N = u.size
    h = T / substeps
    t_fine = np.arange(N * substeps + 1) * h
    brk = np.arange(N) * T + theta
    times = np.union1d(t_fine, brk[brk < t_fine[-1]])
    cache: dict = {}

    def step(dt):
        key = round(dt / h * 2 ** 30)
        if key not in cache:
            M = np.zeros((n + 1, n + 1))
            M[:n, :n] = A * dt
            M[:n, n] = B * dt
            E = scipy.linalg.expm(M)
            cache[key] = (E[:n, :n], E[:n, n])
        return cache[key]

    def held(t):
        k = int(math.floor((t - theta) / T + 1e-9))
        return 0.0 if k < 0 else float(u[min(k, N - 1)])

    x = np.zeros(n)
    ys = np.empty(times.size)
    ys[0] = C @ x + D * held(0.0)
    for i in range(1, times.size):
        t0, t1 = times[i - 1], times[i]
        v = held(t0)
        if n:
            Phi, Gam = step(t1 - t0)
            x = Phi @ x + Gam * v
        ys[i] = C @ x + D * held(t1)
    keep = np.isin(times, t_fine)
    return times[keep], ys[keep]


def ripple(t: np.ndarray, y: np.ndarray, sample_time: float, final: float, *,
           settling_band: float = 0.02, substeps: int = SUBSTEPS) -> float:
    """``intersample_ripple`` of one response (see the module docstring), % of |final|."""
    if not (math.isfinite(final) and final != 0.0):
        raise ComputeError("intersample_ripple needs a finite, non-zero final value")
    ys = y[::substeps]
    dev = np.abs(ys - final) > settling_band * abs(final)
    last = int(np.flatnonzero(dev)[-1]) + 1 if dev.any() else 0
    if last >= ys.size - 1:
        raise ComputeError("the response has not settled on the samples within the horizon")
    start = last * substeps
    seg_t = t[start:]
    seg_y = y[start:]
    k = np.minimum(np.arange(seg_t.size) // substeps, (seg_y.size - 1) // substeps - 1)
    k = np.maximum(k, 0)
    left = seg_y[k * substeps]
    right = seg_y[np.minimum((k + 1) * substeps, seg_y.size - 1)]
    frac = (np.arange(seg_t.size) - k * substeps) / substeps
    line = left + (right - left) * frac
    return float(100.0 * np.max(np.abs(seg_y - line)) / abs(final))


def step_between_samples(pl, index, u_rows, sample_time) -> list[ContinuousStep]:
    """:class:`ContinuousStep` of each family variant ``index[j]`` from its controller output
    ``u_rows[j]`` (the discrete ``r -> u`` step response)."""
    loop = pl.loop
    out = []
    for i, u in zip(index, u_rows):
        v = pl.family.variants[int(i)]
        if getattr(v.system, "dt", None) not in (None, 0):
            raise ComputeError("the plant is discrete: its output between samples is unknown; "
                               "give the continuous plant")
        theta = loop.input_delay + float(v.delay) + loop.computation_delay * sample_time
        t, y = continuous_output(v.system, np.asarray(u, float), sample_time, theta)
        final = float(y[-1])
        out.append(ContinuousStep(t, y, t[::SUBSTEPS], y[::SUBSTEPS], final))
    return out


def continuous_step(family, controller, loop, *, amplitude: float = 1.0) -> list[ContinuousStep]:
    """The continuous plant output of every variant of ``family`` (family order) for a step
    of ``amplitude`` on r, with ``controller`` in the digital ``loop`` (a LoopSpec with a
    sample time)."""
    from .loop import plan as make_plan
    from .timeresp import final_value, step_response
    from .types import PlantFamily

    if loop is None or loop.sample_time is None:
        raise ComputeError("the output between samples needs a digital loop (a sample time)")
    if not isinstance(family, PlantFamily):
        family = PlantFamily.single(family)
    pl = make_plan(family, controller, loop)
    out: list = [None] * len(family)
    for gp in pl.groups:
        g = pl.build(gp)
        u = step_response(g.paths["r->u"], amplitude=amplitude)
        fin = final_value(g.paths["r->y"], amplitude)
        for j, st in enumerate(step_between_samples(pl, g.index, u.y, loop.sample_time)):
            out[int(g.index[j])] = ContinuousStep(st.t, st.y, st.t_samples, st.y_samples,
                                                  float(fin[j]))
    return out


def _crossing(t, y, level, sgn) -> float:
    """First time ``sgn * y`` reaches ``sgn * level`` (linear between grid points)."""
    hit = np.flatnonzero(sgn * y >= sgn * level)
    if hit.size == 0:
        return math.inf
    i = int(hit[0])
    if i == 0:
        return float(t[0])
    y0, y1 = y[i - 1], y[i]
    return float(t[i - 1] + (t[i] - t[i - 1]) * (level - y0) / (y1 - y0))


def step_values(t, y, final: float, *, amplitude: float = 1.0, rise_limits=(0.1, 0.9),
                settling_band: float = 0.02, settling_basis: str = "final") -> dict:
    """Rise time, settling time and overshoot of one continuous step response on its fine
    grid (``time_basis = "continuous"``): the same definitions as at the samples
    (docs/metrics.md), with crossings placed by linear interpolation between the fine
    points (T / SUBSTEPS apart) and the overshoot the largest fine-grid value."""
    if not (math.isfinite(final) and final != 0.0):
        raise ComputeError("the final value is zero or not finite; rise, settling and "
                           "overshoot are undefined")
    sgn = 1.0 if final > 0 else -1.0
    lo, hi = rise_limits
    rise = _crossing(t, y, hi * final, sgn) - _crossing(t, y, lo * final, sgn)
    over = max(0.0, 100.0 * (float(np.max(sgn * y)) - abs(final)) / abs(final))
    band = settling_band * (abs(final) if settling_basis == "final" else abs(amplitude))
    out = np.flatnonzero(np.abs(y - final) > band)
    if out.size == 0:
        settle = 0.0
    elif out[-1] >= y.size - 1:
        raise ComputeError("the response has not settled within the horizon")
    else:
        i = int(out[-1])
        d0, d1 = abs(y[i] - final) - band, abs(y[i + 1] - final) - band
        settle = float(t[i] + (t[i + 1] - t[i]) * d0 / (d0 - d1))
    return {"rise_time": rise, "settling_time": settle, "overshoot": over}
