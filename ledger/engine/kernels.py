"""The metric kernels: one function per metric over a group of the family, and the group
context they share (sub-batches, the loop's frequency batch and grid, closed-loop functions,
cached step responses), so that one assembly, one stability decision, one step response per
path and settings and one frequency grid per group serve every requested metric.

:data:`_COMPUTE` maps each catalogue name to its kernel; :mod:`ledger.engine.measuring` (the
family driver) calls it.  Formulas and references: ``docs/metrics.md``.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import ComputeError
from .loop import Assembly, LoopGroup
from .stability import decay_rate, decay_rate_rows, min_damping, min_damping_rows
from .types import SSBatch

def _sub_batch(b: SSBatch, m: np.ndarray) -> SSBatch:
    return b.take(m)


def _sub_eval(evaluate, m):
    return lambda w: evaluate(w)[m]


def _sub_list(x, m):
    return [x[i] for i in np.flatnonzero(m)]


class _GroupContext:
    """Caches shared work for one group and one stable mask."""

    def __init__(self, asm: Assembly, group: LoopGroup, mask: np.ndarray,
                 stable: np.ndarray | None = None):
        self.asm, self.g, self.m = asm, group, mask
        #: every variant under the mask was found stable by the family's stability decision
        self.all_stable = stable is not None and bool(np.all(np.asarray(stable)[mask]))
        #: per variant under the mask: found stable (``None`` when not decided)
        self.stable = None if stable is None else np.asarray(stable, bool)[mask]
        self._cache: dict = {}

    def cached(self, key, fn):
        if key not in self._cache:
            self._cache[key] = fn()
        return self._cache[key]

    def batch(self, path: str) -> SSBatch:
        return self.cached(("batch", path), lambda: _sub_batch(self.g.paths[path], self.m))

    def fb(self):
        """The group's loop gains restricted to the mask; one object per context, so that the
        kernels' per-FreqBatch memo (grid, delay estimate, crossing set-up) is shared by the
        margins, the disk margin and the stability count."""
        from .types import FreqBatch

        def make():
            from . import freqresp
            fb = self.g.loop_gain
            if not self.m.all():
                fb = FreqBatch(evaluate=_sub_eval(fb.evaluate, self.m), dt=fb.dt,
                               poles=_sub_list(fb.poles, self.m),
                               zeros=_sub_list(fb.zeros, self.m), dc=fb.dc[self.m])
            # the loop delay is known from the assembly: no need to estimate it
            freqresp.set_known_delay(fb, self.g.tau)
            return fb
        return self.cached("fb", make)

    def grid(self):
        from . import freqresp
        return self.cached("grid", lambda: freqresp.frequency_grid(self.fb()))

    def closed(self, which: str):
        """(evaluate, dt, poles, zeros) of a closed-loop function on the mask; one evaluator
        object per context, so that its refined grid is shared (peak and bandwidth of T)."""
        def make():
            c = self.g.closed[which]
            ev = c.evaluate if self.m.all() else _sub_eval(c.evaluate, self.m)
            return (ev, c.dt, _sub_list(c.poles, self.m), _sub_list(c.zeros, self.m))
        return self.cached(("closed", which), make)

    def pairwise(self, which: str):
        """Pairwise evaluator of S or T from the verified model of the loop gain (shared with
        the margins), ``None`` for other functions."""
        from . import freqresp
        if which not in ("S", "T"):
            return None
        return self.cached(("pairwise", which), lambda: freqresp.loop_pairwise(self.fb(), which))


class _PoolContext:
    """The context of the time-response kernels over several clusters of one group at once
    (:data:`ledger.engine.measuring._POOLED`): their closed-loop batches under their masks,
    concatenated in cluster order."""

    def __init__(self, asm: Assembly, groups: list, masks: list):
        self.asm, self._groups, self._masks = asm, groups, masks
        self._cache: dict = {}

    cached = _GroupContext.cached

    def batch(self, path: str) -> SSBatch:
        return self.cached(("batch", path), lambda: _concat_batches(
            [_sub_batch(g.paths[path], m) for g, m in zip(self._groups, self._masks) if m.any()]))


def _concat_batches(bs: list) -> SSBatch:
    """One batch of the variants of several batches of equal shapes and delays."""
    b0 = bs[0]
    if len(bs) == 1:
        return b0
    for b in bs[1:]:
        if b.A.shape[1:] != b0.A.shape[1:] or (b.dt, b.tau, b.io_delay) != (b0.dt, b0.tau,
                                                                           b0.io_delay):
            raise ComputeError("clusters of one group differ in state size or delays")

    def cat(name):
        xs = [getattr(b, name) for b in bs]
        return None if any(x is None for x in xs) else np.concatenate(xs)
    return SSBatch(A=cat("A"), B=cat("B"), C=cat("C"), D=cat("D"), dt=b0.dt, tau=b0.tau,
                   Bw=cat("Bw"), Cz=cat("Cz"), Dz=cat("Dz"), Dw=cat("Dw"), Dzw=cat("Dzw"),
                   io_delay=b0.io_delay, grid_rows=_cat_rows([b.grid_rows for b in bs]))


def _cat_rows(rows: list):
    if any(r is None for r in rows) or len({r.shape[1:] for r in rows}) != 1:
        return None
    return np.concatenate(rows)


def _timeresp():
    try:
        from . import timeresp
    except ImportError as e:
        raise ComputeError("time-domain kernels (ledger.engine.timeresp) are not "
                           "installed; time metrics are unavailable") from e
    return timeresp


def _step(ctx: _GroupContext, s: dict):
    tr = _timeresp()
    key = ("step", s["amplitude"], s["settling_band"], s["settling_basis"], s["rise_limits"])
    return ctx.cached(key, lambda: tr.step_metrics(
        ctx.batch("r->y"), amplitude=s["amplitude"], rise_limits=s["rise_limits"],
        settling_band=s["settling_band"], settling_basis=s["settling_basis"]))


def _margins(ctx):
    from . import margins
    return ctx.cached("margins", lambda: margins.margins(ctx.fb(), grid=ctx.grid()))


def _disk(ctx):
    from . import margins
    # the stability of these variants is already decided (disk metrics need a stable loop):
    # the disk margin does not count encirclements again
    return ctx.cached("disk", lambda: margins.disk_margin(
        ctx.fb(), grid=ctx.grid(), check_stability=not ctx.all_stable))


def _peak(ctx, which, w_range=(0.0, math.inf)):
    from . import freqresp
    ev, dt, poles, zeros = ctx.closed(which)
    peak, _ = freqresp.peak_gain(ev, dt, poles, zeros, w_range=w_range, grid=ctx.grid(),
                                 pairwise=ctx.pairwise(which))
    return np.asarray(peak, dtype=float)


def _low_frequency(ctx: _GroupContext):
    """(type, limit coefficient) of L at s = 0 (z = 1) per variant."""
    def compute():
        K, Gs, H = ctx.g.blocks
        dt = ctx.asm.dt
        origin = 1.0 if dt else 0.0
        types, coefs = [], []
        for j in np.flatnonzero(ctx.m):
            z = np.concatenate([K.zeros, Gs[j].zeros, H.zeros])
            p = np.concatenate([K.poles, Gs[j].poles, H.poles])
            gain = K.gain * Gs[j].gain * H.gain
            scale = max([1.0] + list(np.abs(np.concatenate([z, p]))))
            zo = np.abs(z - origin) < 1e-6 * scale
            po = np.abs(p - origin) < 1e-6 * scale
            k = int(np.sum(po) - np.sum(zo))
            val = gain * np.prod(origin - z[~zo]) / np.prod(origin - p[~po])
            if gain == 0:
                k, val = 0, 0.0
            if dt and k > 0:
                val = val / dt ** k
            types.append(k)
            coefs.append(float(np.real(val)))
        return np.array(types), np.array(coefs)
    return ctx.cached("lowfreq", compute)


def _constant(ctx, order: int) -> np.ndarray:
    k, c = _low_frequency(ctx)
    out = np.where(k > order, np.copysign(np.inf, c), np.where(k == order, c, 0.0))
    return out.astype(float)


def _prefilter_dc(ctx) -> float:
    F = _prefilter_block(ctx)
    origin = 1.0 if ctx.asm.dt else 0.0
    val = F(np.array([origin], dtype=complex))[0]
    if not np.isfinite(val):
        raise ComputeError("the prefilter has a pole at s = 0; steady-state errors do not exist")
    return float(np.real(val))


def _prefilter_block(ctx):
    from .loop import make_block
    pf = ctx.asm.loop.prefilter
    return make_block(1.0 if pf is None else pf, "prefilter")


def _error(ctx, order: int, s) -> np.ndarray:
    k, c = _low_frequency(ctx)
    a = abs(s["amplitude"] * _prefilter_dc(ctx))
    with np.errstate(divide="ignore"):
        if order == 0:
            val = np.where(k > 0, 0.0, a / np.abs(1.0 + np.where(k == 0, c, 0.0)))
        else:
            val = np.where(k > order, 0.0, np.where(k == order, a / np.abs(c), np.inf))
    return val.astype(float)


def _poles(ctx, fn) -> np.ndarray:
    if ctx.g.poles is None:
        if fn is decay_rate:
            return ctx.cached("decay_delayed", lambda: _decay_delayed(ctx))
        raise ComputeError("a continuous loop with a delay has infinitely many closed-loop "
                           "poles; min_damping needs a delay-free or digital loop")
    rows = [ctx.g.poles[j] for j in np.flatnonzero(ctx.m)]
    batch = _POLE_BATCH.get(fn)
    if batch is not None and rows and len({np.size(r) for r in rows}) == 1 and np.size(rows[0]):
        return batch(np.stack(rows), ctx.asm.dt)
    return np.array([fn(r, ctx.asm.dt) for r in rows])


def _decay_delayed(ctx) -> np.ndarray:
    """Decay rate of a delayed continuous group on the mask: the rightmost characteristic root
    of the delay equation (:func:`~ledger.engine.stability.rightmost_delayed_root`)."""
    from .stability import rightmost_delayed_root

    b = ctx.batch("d->y")
    return np.array([-rightmost_delayed_root(b.A[j], b.Bw[j], b.Cz[j], float(b.Dzw[j]),
                                             b.tau).real for j in range(b.nvar)])


def _disturbance(ctx, s, part: int):
    tr = _timeresp()
    to = s.get("recovery_to", "final")
    key = ("recovery", s["amplitude"], s.get("band", 0.02), to)
    res = ctx.cached(key, lambda: tr.recovery(ctx.batch("d->y"), amplitude=s["amplitude"],
                                              band=s.get("band", 0.02), to=to))
    return np.asarray(res[part], dtype=float)


def _disturbance_offset(ctx, s) -> np.ndarray:
    """``|y(inf)|`` after a step input disturbance, by the final-value theorem from the
    closed-loop matrices (``timeresp.final_value``; 0 up to rounding with an integrator in the
    controller).  An integrating d->y path (singular equilibrium) has no offset to state."""
    tr = _timeresp()
    return np.abs(np.asarray(tr.final_value(ctx.batch("d->y"), s["amplitude"]), dtype=float))


def _moves(ctx, s):
    from . import movemetrics
    key = ("move", s["move"], s["settling_band"], s["settling_basis"])
    return ctx.cached(key, lambda: movemetrics.move_metrics_group(ctx.asm, ctx.g, ctx.m, s))


#: row-wise forms of the pole metrics, for groups whose variants have equally many poles
_POLE_BATCH = {min_damping: min_damping_rows, decay_rate: decay_rate_rows}

_COMPUTE = {
    "rise_time": lambda c, s: _timed(c, s, "rise_time"),
    "settling_time": lambda c, s: _timed(c, s, "settling_time"),
    "overshoot": lambda c, s: _timed(c, s, "overshoot"),
    "undershoot": lambda c, s: _step(c, s).undershoot,
    "peak_time": lambda c, s: _step(c, s).peak_time,
    "steady_state_error": lambda c, s: _error(c, 0, s),
    "ramp_error": lambda c, s: _error(c, 1, s),
    "parabola_error": lambda c, s: _error(c, 2, s),
    "position_constant": lambda c, s: _constant(c, 0),
    "velocity_constant": lambda c, s: _constant(c, 1),
    "acceleration_constant": lambda c, s: _constant(c, 2),
    "system_type": lambda c, s: _low_frequency(c)[0].astype(float),
    "peak_effort": lambda c, s: _timeresp().peak_abs(c.batch("r->u"), amplitude=s["amplitude"])[0],
    "disturbance_peak": lambda c, s: _disturbance(c, s, 0),
    "disturbance_recovery": lambda c, s: _disturbance(c, s, 2),
    "gain_margin": lambda c, s: _margins(c).gain_margin,
    "gain_margin_lower": lambda c, s: _margins(c).gain_margin_lower,
    "phase_margin": lambda c, s: _margins(c).phase_margin,
    "delay_margin": lambda c, s: _delay_margin(c),
    "gain_crossover": lambda c, s: _margins(c).gain_crossover,
    "phase_crossover": lambda c, s: _margins(c).phase_crossover,
    "bandwidth": lambda c, s: _bandwidth(c),
    "peak_sensitivity": lambda c, s: _peak(c, "S"),
    "peak_complementary_sensitivity": lambda c, s: _peak(c, "T"),
    "peak_control_sensitivity": lambda c, s: _peak(c, "CS"),
    "sensitivity_below": lambda c, s: _peak(c, "S", (0.0, s["frequency"])),
    "complementary_sensitivity_above": lambda c, s: _peak(c, "T", (s["frequency"], math.inf)),
    "disk_margin": lambda c, s: _disk(c).alpha,
    "disk_gain_margin": lambda c, s: _disk_gain(c),
    "disk_phase_margin": lambda c, s: _disk_phase(c),
    "min_damping": lambda c, s: _poles(c, min_damping),
    "decay_rate": lambda c, s: _poles(c, decay_rate),
    "quantization_pole_shift": lambda c, s: _pole_shift(c),
    "intersample_ripple": lambda c, s: _ripple(c, s),
    "rms_error": lambda c, s: _rms().kernel(c, s, "y"),
    "rms_effort": lambda c, s: _rms().kernel(c, s, "u"),
    "disturbance_offset": _disturbance_offset,
    "move_settling_time": lambda c, s: _moves(c, s).settling_time,
    "move_overshoot": lambda c, s: _moves(c, s).overshoot,
    "move_time_saturated": lambda c, s: _moves(c, s).time_saturated,
    "move_peak_rate": lambda c, s: _moves(c, s).peak_rate,
}


def _timed(ctx, s, which: str) -> np.ndarray:
    """rise, settling or overshoot: at the samples (default) or, ``time_basis="continuous"``
    on a digital loop, on the continuous output (:func:`ledger.engine.intersample.step_values`)."""
    if s.get("time_basis", "samples") == "samples" or ctx.asm.dt is None:
        return getattr(_step(ctx, s), which)
    from .intersample import step_between_samples, step_values

    def compute():
        tr = _timeresp()
        u = tr.step_response(ctx.batch("r->u"), amplitude=s["amplitude"])
        final = tr.final_value(ctx.batch("r->y"), s["amplitude"])
        steps = step_between_samples(ctx.asm, ctx.g.index[ctx.m], u.y, ctx.asm.dt)
        rows = [step_values(st.t, st.y, float(f), amplitude=s["amplitude"],
                            rise_limits=s["rise_limits"], settling_band=s["settling_band"],
                            settling_basis=s["settling_basis"])
                for st, f in zip(steps, final)]
        return {k: np.array([r[k] for r in rows], dtype=float)
                for k in ("rise_time", "settling_time", "overshoot")}

    key = ("continuous", s["amplitude"], s["settling_band"], s["settling_basis"],
           s["rise_limits"])
    return ctx.cached(key, compute)[which]


def _ripple(ctx, s) -> np.ndarray:
    """``intersample_ripple`` per variant under the mask (:mod:`ledger.engine.intersample`)."""
    from .intersample import ripple, step_between_samples

    tr = _timeresp()
    dt = ctx.asm.dt
    if dt is None:
        raise ComputeError("intersample_ripple needs a digital loop (one with a sample time)")
    u = tr.step_response(ctx.batch("r->u"), amplitude=s["amplitude"])
    final = tr.final_value(ctx.batch("r->y"), s["amplitude"])
    steps = step_between_samples(ctx.asm, ctx.g.index[ctx.m], u.y, dt)
    return np.array([ripple(st.t, st.y, dt, float(f), settling_band=s["settling_band"])
                     for st, f in zip(steps, final)], dtype=float)


def _pole_shift(ctx) -> np.ndarray:
    """Per variant under the mask: the largest closed-loop pole movement caused by the
    controller's quantisation (:func:`ledger.engine.quantize.pole_shift`)."""
    from dataclasses import replace

    from .loop import assemble
    from .quantize import pole_shift
    from .types import PlantFamily

    pl = ctx.asm
    idx = ctx.g.index[ctx.m]
    if pl.reference is None:
        return np.zeros(idx.size)
    if ctx.g.poles is None:
        raise ComputeError("quantization_pole_shift needs a digital loop")
    ref_loop = replace(pl.loop, number_format=None, reference_controller=None,
                       controller_discretization=None)
    rows = [ctx.g.poles[j] for j in np.flatnonzero(ctx.m)]
    out = []
    for i, moved in zip(idx, rows):
        ref = assemble(PlantFamily((pl.family.variants[int(i)],)), pl.reference, ref_loop)
        out.append(pole_shift(ref.groups[0].poles[0], moved))
    return np.array(out, dtype=float)


def _rms():
    from . import rms
    return rms


def _delay_margin(ctx):
    """Delay margin per variant, s; 0 where the closed loop is already unstable (no added
    delay is needed to lose stability, and the crossover formula of
    :class:`~ledger.engine.margins.Margins` is no margin there)."""
    dm = np.asarray(_margins(ctx).delay_margin, dtype=float)
    if ctx.stable is None:
        return dm
    return np.where(ctx.stable, dm, 0.0)


def _bandwidth(ctx):
    from . import freqresp
    ev, dt, poles, zeros = ctx.closed("T")
    return np.asarray(freqresp.bandwidth(ev, dt, poles, zeros, grid=ctx.grid(),
                                         pairwise=ctx.pairwise("T")), dtype=float)


def _disk_gain(ctx):
    return np.asarray(_disk(ctx).gain_high_db, dtype=float)


def _disk_phase(ctx):
    return np.asarray(_disk(ctx).phase_deg, dtype=float)
