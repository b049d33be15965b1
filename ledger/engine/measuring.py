"""Measure metrics of a loop over a plant family: ``measure`` and ``measure_family``.

One assembly, one stability decision, one step response per path and settings, and one
frequency grid per group are shared by all requested metrics (the kernels and their group
context are in :mod:`ledger.engine.kernels`; results and hashing in
:mod:`ledger.engine.results`).  Values are worst-case over the family (by each metric's
direction of "better"); a metric that cannot be computed is never silently present: its
reason is kept and reading it raises.

This module is also ``ledger.engine.measure``: the package registers it under that name (see
``ledger/engine/__init__.py``), so ``from ledger.engine.measure import measure_family`` works
while ``from ledger.engine import measure`` stays the function.  It is imported with the
package, so its top level imports nothing heavy: python-control and the kernels are imported
when a measurement runs.
"""

from __future__ import annotations

import os
from collections.abc import Iterable
from types import MappingProxyType
from typing import TYPE_CHECKING

import numpy as np

from ..errors import LedgerError, ModelError, SpecError, UnstableLoopError
from ..systems.variants import PlantFamily
from .metrics import METRICS, SETTING_DOCS, STANDARD_SUITE, get_metric, resolve_settings
from .results import (ENGINE_VERSION, FamilyResult, Measurement, MetricResult,  # noqa: F401
                      fingerprint, request_key)

if TYPE_CHECKING:
    from .loop import LoopSpec, Plan

__all__ = ["ENGINE_VERSION", "MetricResult", "FamilyResult", "Measurement", "measure",
           "measure_family", "request_key", "fingerprint", "LOOP_SETTINGS",
           "METRIC_SETTINGS"]

#: ``measure`` keyword -> LoopSpec field.
LOOP_SETTINGS = MappingProxyType({
    "delay": "input_delay", "input_delay": "input_delay", "output_delay": "output_delay",
    "sample_time": "sample_time", "computation_delay": "computation_delay",
    "sensor": "sensor", "prefilter": "prefilter", "actuator_limit": "actuator_limit",
    "controller_discretization": "controller_discretization", "rate_limit": "rate_limit",
    "anti_windup": "anti_windup", "anti_windup_gain": "anti_windup_gain"})

#: ``measure`` keyword -> metric setting.
METRIC_SETTINGS = MappingProxyType({
    "amplitude": "amplitude", "step_amplitude": "amplitude", "settling_band": "settling_band",
    "settling_basis": "settling_basis", "rise_limits": "rise_limits",
    "frequency": "frequency", "band": "band", "recovery_to": "recovery_to", "move": "move"})


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
    from .loop import LoopSpec, plan

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
    from .kernels import _COMPUTE, _GroupContext
    from .stability import group_stability

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
    from .stability import StabilityReport

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
    from .loop import LoopSpec

    loop = LoopSpec(**loop_kw)
    family = _as_family(plant, loop.sample_time)
    controller = _as_controller(controller, loop.sample_time)
    requests = [(n, {k: v for k, v in metric_kw.items() if k in METRICS[n].defaults})
                for n in names]
    result = measure_family(family, controller, loop, requests)
    keys = {n: request_key(n, resolve_settings(n, s)) for n, s in requests}
    return Measurement(result=result, request_keys=MappingProxyType(keys))
