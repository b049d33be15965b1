"""Measure metrics of a loop over a plant family: ``measure`` and ``measure_family``.

One assembly, one stability decision, one step response per path and settings, and one
frequency grid per group are shared by all requested metrics.  Values are worst-case over
the family (by each metric's direction of "better"); a metric that cannot be computed is
never silently present: its reason is kept and reading it raises.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field, fields
from types import MappingProxyType
from typing import Any

import control
import numpy as np

from ..errors import ComputeError, LedgerError, ModelError, SpecError, UnstableLoopError
from .loop import Assembly, LoopGroup, LoopSpec, Plan, assemble, plan
from .metrics import METRICS, SETTING_DOCS, STANDARD_SUITE, get_metric, resolve_settings
from .stability import (StabilityReport, decay_rate, decay_rate_rows, group_stability,
                        min_damping, min_damping_rows, stability)
from .types import PlantFamily, SSBatch

__all__ = ["ENGINE_VERSION", "MetricResult", "FamilyResult", "Measurement", "measure",
           "measure_family", "request_key", "fingerprint", "LOOP_SETTINGS",
           "METRIC_SETTINGS"]

#: Bumped whenever a number the engine returns may change; part of every fingerprint.
ENGINE_VERSION = "engine-4"

#: ``measure`` keyword -> LoopSpec field.
LOOP_SETTINGS = MappingProxyType({
    "delay": "input_delay", "input_delay": "input_delay", "output_delay": "output_delay",
    "sample_time": "sample_time", "computation_delay": "computation_delay",
    "sensor": "sensor", "prefilter": "prefilter", "actuator_limit": "actuator_limit",
    "controller_discretization": "controller_discretization"})

#: ``measure`` keyword -> metric setting.
METRIC_SETTINGS = MappingProxyType({
    "amplitude": "amplitude", "step_amplitude": "amplitude", "settling_band": "settling_band",
    "settling_basis": "settling_basis", "rise_limits": "rise_limits",
    "frequency": "frequency", "band": "band"})


# --------------------------------------------------------------------------- results

@dataclass(frozen=True)
class MetricResult:
    """One metric with one set of settings, over every variant.

    Attributes
    ----------
    name : str
    settings : dict
        Complete settings used.
    key : str
        :func:`request_key` of (name, settings).
    values : ndarray (V,)
        Per-variant values; a failed variant holds the worst-direction infinity.
    variant_errors : dict
        Variant name -> reason, for variants that could not be computed.
    unstable : bool
        True when a failure is due to an unstable loop.
    """

    name: str
    settings: dict
    key: str
    values: np.ndarray
    variant_errors: dict
    unstable: bool
    variants: tuple = field(repr=False, default=())

    @property
    def error(self) -> str | None:
        """Reason the family-wide value does not exist, or ``None``."""
        if not self.variant_errors:
            return None
        first = next(iter(self.variant_errors.items()))
        more = len(self.variant_errors) - 1
        tail = f" (and {more} more variant(s))" if more else ""
        return f"{self.name}: {first[1]}{tail}"

    def _worst_index(self) -> int:
        mdef = METRICS[self.name]
        return int(np.argmax(self.values) if mdef.better == "lower" else np.argmin(self.values))

    @property
    def worst(self) -> float:
        """Worst value over the family; raises when any variant failed."""
        if self.variant_errors:
            cls = UnstableLoopError if self.unstable else ComputeError
            raise cls(self.error)
        return float(self.values[self._worst_index()])

    @property
    def worst_variant(self) -> str:
        """Name of the variant that gives :attr:`worst` (or the first failed one)."""
        if self.variant_errors:
            return next(iter(self.variant_errors))
        return self.variants[self._worst_index()]


@dataclass(frozen=True)
class FamilyResult:
    """Results of :func:`measure_family`.

    Attributes
    ----------
    variants : tuple of str
    results : Mapping[str, MetricResult]
        Keyed by :func:`request_key`.
    stability : StabilityReport
    """

    variants: tuple
    results: Mapping
    stability: StabilityReport

    def get(self, name: str, settings: dict | None = None) -> MetricResult:
        """The result of ``name`` with ``settings`` (completed with defaults)."""
        return self.results[request_key(name, resolve_settings(name, settings))]


@dataclass(frozen=True, eq=False)
class Measurement(Mapping):
    """Worst-case metric values over a family, as a read-only mapping name -> float.

    Iteration and ``in`` cover the metrics that were computed for every variant.  Reading a
    metric that failed raises :class:`~ledger.errors.UnstableLoopError` or
    :class:`~ledger.errors.ComputeError` with the reason; see :attr:`errors`.
    """

    result: FamilyResult
    request_keys: Mapping

    def _res(self, name: str) -> MetricResult:
        try:
            return self.result.results[self.request_keys[name]]
        except KeyError as e:
            raise KeyError(f"{name!r} was not measured; measured: {', '.join(self.request_keys)}") from e

    def __getitem__(self, name: str) -> float:
        return self._res(name).worst

    def __iter__(self):
        return (n for n in self.request_keys if not self._res(n).variant_errors)

    def __len__(self) -> int:
        return sum(1 for _ in self)

    def __contains__(self, name) -> bool:
        return name in self.request_keys and not self._res(name).variant_errors

    def __repr__(self) -> str:
        parts = [f"{n}={self[n]:.6g}" for n in self]
        parts += [f"{n}=<error>" for n in self.errors]
        return f"Measurement({', '.join(parts)})"

    @property
    def variants(self) -> tuple:
        """Variant names in family order."""
        return self.result.variants

    @property
    def errors(self) -> dict:
        """Metric name -> reason, for metrics without a family-wide value."""
        return {n: self._res(n).error for n in self.request_keys if self._res(n).variant_errors}

    def per_variant(self, name: str) -> np.ndarray:
        """Values per variant (V,); failed variants hold the worst-direction infinity."""
        return self._res(name).values.copy()

    def variant_errors(self, name: str) -> dict:
        """Variant name -> reason for the variants where ``name`` failed."""
        return dict(self._res(name).variant_errors)

    def worst_variant(self, name: str) -> str:
        """Name of the variant giving the worst value of ``name``."""
        return self._res(name).worst_variant

    def unit(self, name: str) -> str:
        """Unit of a metric."""
        return get_metric(name).unit


# --------------------------------------------------------------------------- hashing

def _canon(x: Any):
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    if isinstance(x, (float, np.floating)):
        x = float(x) + 0.0
        return repr(x) if not math.isfinite(x) else format(x, ".15e")
    if isinstance(x, str) or x is None:
        return x
    if isinstance(x, (tuple, list)):
        return [_canon(v) for v in x]
    if isinstance(x, Mapping):
        return {str(k): _canon(v) for k, v in sorted(x.items())}
    if isinstance(x, (control.TransferFunction, control.StateSpace)):
        return {"lti": _digest(x)}
    raise TypeError(f"cannot hash a {type(x).__name__}")


def _digest(system, delay: float = 0.0) -> str:
    try:
        from ledger.systems import system_digest
    except ImportError:  # parser package not present: own canonical tf form
        tf = control.tf(system)
        num, den = np.asarray(tf.num[0][0], float), np.asarray(tf.den[0][0], float)
        lead = den[np.flatnonzero(den)[0]]
        payload = json.dumps([_canon(list(num / lead)), _canon(list(den / lead)),
                              _canon(tf.dt or 0.0), _canon(delay)])
        return hashlib.sha256(payload.encode()).hexdigest()
    return system_digest(system, delay)


def request_key(name: str, settings: Mapping) -> str:
    """Stable hash of a metric name and its (complete) settings, 16 hex characters."""
    payload = json.dumps([name, _canon(dict(settings))], sort_keys=True)
    return hashlib.sha256(payload.encode()).hexdigest()[:16]


def fingerprint(variant, controller, loop: LoopSpec, metric: str, settings: Mapping) -> str:
    """SHA-256 of everything a cached metric value of one variant depends on.

    Parameters
    ----------
    variant : Variant
    controller : control.LTI
    loop : LoopSpec
    metric : str
    settings : mapping
        Complete metric settings.

    Returns
    -------
    str
        64 hex characters; includes :data:`ENGINE_VERSION`.
    """
    loop_form = {f.name: _canon(getattr(loop, f.name)) for f in fields(loop)}
    payload = json.dumps({"engine": ENGINE_VERSION,
                          "plant": _digest(variant.system, variant.delay),
                          "controller": _digest(controller) if not isinstance(
                              controller, (int, float)) else _canon(controller),
                          "loop": loop_form, "metric": metric,
                          "settings": _canon(dict(settings))}, sort_keys=True)
    return hashlib.sha256(payload.encode()).hexdigest()


# --------------------------------------------------------------------------- kernels

def _sub_batch(b: SSBatch, m: np.ndarray) -> SSBatch:
    def s(x):
        return None if x is None else x[m]
    return SSBatch(A=b.A[m], B=b.B[m], C=b.C[m], D=b.D[m], dt=b.dt, tau=b.tau, Bw=s(b.Bw),
                   Cz=s(b.Cz), Dz=s(b.Dz), Dw=s(b.Dw), Dzw=s(b.Dzw), io_delay=b.io_delay)


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
    key = ("recovery", s["amplitude"], s.get("band", 0.02))
    res = ctx.cached(key, lambda: tr.recovery(ctx.batch("d->y"), amplitude=s["amplitude"],
                                              band=s.get("band", 0.02)))
    return np.asarray(res[part], dtype=float)


#: row-wise forms of the pole metrics, for groups whose variants have equally many poles
_POLE_BATCH = {min_damping: min_damping_rows, decay_rate: decay_rate_rows}

_COMPUTE = {
    "rise_time": lambda c, s: _step(c, s).rise_time,
    "settling_time": lambda c, s: _step(c, s).settling_time,
    "overshoot": lambda c, s: _step(c, s).overshoot,
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
}


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


# --------------------------------------------------------------------------- drivers

def measure_family(family: PlantFamily, controller, loop: LoopSpec | None,
                   requests: Iterable, *, workers: int = 1) -> FamilyResult:
    """Measure (metric name, settings) requests over every variant of a family.

    The family is planned into groups (:func:`~ledger.engine.loop.plan`) and measured one
    group at a time: each group's matrices, grids and responses are built, measured and
    dropped before the next, so memory beyond the per-variant result arrays does not grow
    with the family (families above 20,000 variants also re-make their plant blocks group by
    group).  The numbers of a variant depend only on its group, so ``workers`` > 1 (groups
    split across processes) gives exactly the same result.

    Parameters
    ----------
    family : PlantFamily
    controller : control.LTI or float
    loop : LoopSpec or None
    requests : iterable of (str, dict or None)
        Metric name and its settings (missing settings take the catalogue defaults).  Two
        requests may name the same metric with different settings.
    workers : int, optional
        Processes measuring groups in parallel (default 1; ``0`` = one per core).  Used only
        when the family has more than one group.

    Returns
    -------
    FamilyResult
        Results keyed by :func:`request_key` of (name, complete settings).

    Raises
    ------
    SpecError
        Unknown metric or setting.
    ModelError
        The loop cannot be assembled.
    """
    loop = loop or LoopSpec()
    reqs = []
    seen = set()
    for item in requests:
        name, settings = (item, None) if isinstance(item, str) else item
        full = resolve_settings(name, settings)
        key = request_key(name, full)
        if key not in seen:
            seen.add(key)
            reqs.append((name, full, key))
    pl = plan(family, controller, loop)
    workers = (os.cpu_count() or 1) if workers == 0 else max(1, int(workers))
    if workers > 1 and len(pl.groups) > 1:
        outs = _measure_parallel(pl, reqs, workers)
    else:
        outs = (_measure_group(pl, gp, reqs) for gp in pl.groups)
    return _collect(pl, reqs, outs)


def _measure_group(pl: Plan, gp, reqs) -> tuple:
    """Build one planned group and measure every request on it.

    Returns ``(index, (counts, reasons, method), {key: (values, errors, unstable)})`` with
    values over the group's variants and errors as (family index, reason) pairs."""
    g = pl.build(gp)
    counts, reasons, method = group_stability(g, pl.dt, pl.variants)
    stable = counts == 0
    contexts: dict = {}
    out = {}
    for name, full, key in reqs:
        if name == "stable":
            continue
        mdef = METRICS[name]
        vals_g = np.full(g.index.size, np.inf * mdef.worst_sign())
        errors: list = []
        unstable = False
        ok = stable if mdef.needs_stable else np.ones(g.index.size, bool)
        for j in np.flatnonzero(~ok):
            errors.append((int(g.index[j]), reasons[j]))
            unstable = True
        if np.any(ok):
            ckey = ok.tobytes()
            if ckey not in contexts:
                contexts[ckey] = _GroupContext(pl, g, ok, stable)
            ctx = contexts[ckey]
            try:
                vals = np.asarray(_COMPUTE[name](ctx, full), dtype=float).reshape(-1)
            except LedgerError as e:
                for i in g.index[ok]:
                    errors.append((int(i), str(e)))
                unstable = unstable or isinstance(e, UnstableLoopError)
            else:
                pos = np.flatnonzero(ok)
                nan = np.isnan(vals)
                vals_g[pos[~nan]] = vals[~nan]
                for i in g.index[pos[nan]]:
                    errors.append((int(i), "the value could not be computed (NaN)"))
        out[key] = (vals_g, errors, unstable)
    return g.index, (counts, reasons, method), out


def _collect(pl: Plan, reqs, outs) -> FamilyResult:
    """Put per-group outputs of :func:`_measure_group` together in family order."""
    V = len(pl.variants)
    counts = np.zeros(V, dtype=int)
    reasons = [""] * V
    method = "poles"
    values = {key: np.full(V, np.inf * METRICS[name].worst_sign()) for name, _, key in reqs}
    errors: dict = {key: [] for _, _, key in reqs}
    unstable = {key: False for _, _, key in reqs}
    for index, (cnt, why, how), per in outs:
        counts[index] = cnt
        for j, i in enumerate(index):
            reasons[i] = why[j]
        if how == "nyquist":
            method = how
        for key, (vals, errs, uns) in per.items():
            values[key][index] = vals
            errors[key].extend(errs)
            unstable[key] = unstable[key] or uns
    stab = StabilityReport(stable=counts == 0, unstable_poles=counts, method=method,
                           reasons=tuple(reasons))
    names = pl.variants
    results = {}
    for name, full, key in reqs:
        if name == "stable":
            vals, errs = stab.stable.astype(float), {}
        else:
            vals = values[key]
            errs = {names[i]: why for i, why in sorted(errors[key], key=lambda e: e[0])}
        results[key] = MetricResult(name=name, settings=full, key=key, values=vals,
                                    variant_errors=errs, unstable=unstable[key],
                                    variants=names)
    return FamilyResult(variants=names, results=MappingProxyType(results), stability=stab)


# state of a worker process: the plan and requests it measures groups of (inherited by fork,
# or sent once per worker by the pool initialiser under spawn)
_WORKER: dict = {}


def _worker_init(pl, reqs) -> None:
    from ..workers import die_with_parent

    die_with_parent()  # a killed command leaves no worker behind (ledger/workers.py)
    _WORKER["plan"], _WORKER["reqs"] = pl, reqs
    # one BLAS thread per worker: the workers already fill the cores, and a forked worker whose
    # parent had started a BLAS thread pool otherwise competes with its sibling's threads
    # (measured: 1.15x instead of 1.9x on two cores)
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return
    _WORKER["blas"] = threadpool_limits(limits=1, user_api="blas")


def _worker_run(positions) -> list:
    pl, reqs = _WORKER["plan"], _WORKER["reqs"]
    return [_measure_group(pl, pl.groups[k], reqs) for k in positions]


def _measure_parallel(pl: Plan, reqs, workers: int) -> list:
    """Groups measured in ``workers`` processes, a few groups per task, results in plan
    order."""
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    n = len(pl.groups)
    workers = min(workers, n)
    # several tasks per worker balance uneven groups; each task carries a few groups so the
    # round trips stay few
    per = max(1, n // (4 * workers))
    tasks = [list(range(k, min(n, k + per))) for k in range(0, n, per)]
    ctx = mp.get_context("fork" if "fork" in mp.get_all_start_methods() else "spawn")
    with ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_worker_init,
                             initargs=(pl, reqs)) as pool:
        out = []
        for res in pool.map(_worker_run, tasks):
            out.extend(res)
    return out


def _as_family(plant, sample_time) -> PlantFamily:
    if isinstance(plant, PlantFamily):
        return plant
    if isinstance(plant, str):
        from ledger.systems import parse_model
        ev = parse_model(plant, sample_time=sample_time)
        return PlantFamily.single(ev.system, delay=ev.delay)
    return PlantFamily.single(plant)


def _as_controller(controller, sample_time):
    if isinstance(controller, str):
        from ledger.systems import parse_model
        ev = parse_model(controller, sample_time=sample_time)
        if ev.delay:
            raise ModelError("the controller text has a delay; give loop delays as "
                             "delay=/output_delay= settings instead")
        return ev.system
    return controller


def measure(plant, controller, names: Iterable[str] | None = None, **settings) -> Measurement:
    """Measure metrics of ``controller`` closed round ``plant``, worst case over the family.

    Parameters
    ----------
    plant : control.LTI, str or PlantFamily
        A python-control system, model text, or a family (worst case over its variants).
    controller : control.LTI, float or str
    names : iterable of str, optional
        Metric names (default :data:`~ledger.engine.metrics.STANDARD_SUITE`).
    **settings
        Loop settings (``delay`` = ``input_delay``, ``output_delay``, ``sample_time``,
        ``computation_delay``, ``sensor``, ``prefilter``, ``actuator_limit``,
        ``controller_discretization``) and metric settings (``amplitude`` or
        ``step_amplitude``, ``settling_band``, ``settling_basis``, ``rise_limits``,
        ``frequency``, ``band``), applied to every requested metric that takes them.

    Returns
    -------
    Measurement

    Raises
    ------
    SpecError
        Unknown metric name or setting, or a setting no requested metric takes.
    ModelError
        The loop cannot be assembled.
    """
    names = list(STANDARD_SUITE if names is None else ([names] if isinstance(names, str)
                                                          else names))
    for n in names:
        get_metric(n)
    loop_kw, metric_kw = {}, {}
    for key, value in settings.items():
        if key in LOOP_SETTINGS:
            field_name = LOOP_SETTINGS[key]
            if field_name in loop_kw:
                raise SpecError(f"setting {key!r} repeats {field_name!r}; give one of them")
            loop_kw[field_name] = value
        elif key in METRIC_SETTINGS:
            metric_kw[METRIC_SETTINGS[key]] = value
        else:
            valid = sorted(set(LOOP_SETTINGS) | set(METRIC_SETTINGS))
            raise SpecError(f"unknown setting {key!r}; valid settings: {', '.join(valid)}")
    for key in metric_kw:
        if not any(key in METRICS[n].defaults for n in names):
            raise SpecError(f"setting {key!r} ({SETTING_DOCS[key]}) is used by none of the "
                            f"requested metrics: {', '.join(names)}")
    loop = LoopSpec(**loop_kw)
    family = _as_family(plant, loop.sample_time)
    controller = _as_controller(controller, loop.sample_time)
    requests = [(n, {k: v for k, v in metric_kw.items() if k in METRICS[n].defaults})
                for n in names]
    result = measure_family(family, controller, loop, requests)
    keys = {n: request_key(n, resolve_settings(n, s)) for n, s in requests}
    return Measurement(result=result, request_keys=MappingProxyType(keys))
