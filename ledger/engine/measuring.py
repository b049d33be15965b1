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
           "METRIC_SETTINGS", "resolve_requests", "task_groups", "measure_groups",
           "collect_groups"]

#: ``measure`` keyword -> LoopSpec field.
LOOP_SETTINGS = MappingProxyType({
    "delay": "input_delay", "input_delay": "input_delay", "output_delay": "output_delay",
    "sample_time": "sample_time", "computation_delay": "computation_delay",
    "sensor": "sensor", "prefilter": "prefilter", "actuator_limit": "actuator_limit",
    "controller_discretization": "controller_discretization",
    "discretization": "controller_discretization", "number_format": "number_format",
    "reference_controller": "reference_controller", "spectra": "spectra",
    "rate_limit": "rate_limit", "anti_windup": "anti_windup",
    "anti_windup_gain": "anti_windup_gain"})

#: ``measure`` keyword -> metric setting.
METRIC_SETTINGS = MappingProxyType({
    "amplitude": "amplitude", "step_amplitude": "amplitude", "settling_band": "settling_band",
    "settling_basis": "settling_basis", "rise_limits": "rise_limits",
    "frequency": "frequency", "band": "band", "time_basis": "time_basis", "source": "source",
    "error": "error", "sigmas": "sigmas", "recovery_to": "recovery_to",
    "move": "move"})


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
    reqs = resolve_requests(requests)
    if any(v.kind == "measured" for v in family.variants) or any(
            name in ("model_fit", "model_fit_phase") for name, _, _ in reqs):
        from .measuredfamily import measure_mixed

        return measure_mixed(family, controller, loop, reqs, lambda sub, rs: measure_family(
            sub, controller, loop, [(n, f) for n, f, _ in rs], workers=workers))
    pl = plan(family, controller, loop)
    workers = (os.cpu_count() or 1) if workers == 0 else max(1, int(workers))
    if workers > 1 and len(pl.groups) > 1:
        outs = _measure_parallel(pl, reqs, workers)
    else:
        outs = (_measure_group(pl, gp, reqs) for gp in pl.groups)
    return _collect(pl, reqs, outs)


def resolve_requests(requests: Iterable) -> list[tuple[str, dict, str]]:
    """(name, complete settings, :func:`request_key`) of each distinct request, in order.

    Raises
    ------
    SpecError
        Unknown metric or setting.
    """
    reqs = []
    seen = set()
    for item in requests:
        name, settings = (item, None) if isinstance(item, str) else item
        full = resolve_settings(name, settings)
        key = request_key(name, full)
        if key not in seen:
            seen.add(key)
            reqs.append((name, full, key))
    return reqs


def task_groups(n_groups: int, workers: int, *, least: int = 1) -> list[list[int]]:
    """Positions of a plan's groups cut into tasks of consecutive groups, largest first: each
    task takes about ``1 / (2 workers)`` of the groups still left, and at least ``least`` (so
    a task carries enough work to be worth its round trip).  The tasks shrink towards the
    end, so the workers finish together however uneven the groups are (tasks of equal size
    left one worker alone with the last one).  How groups are cut never changes a number."""
    per_slot = 2 * max(1, int(workers))
    least = max(1, int(least))
    out, k = [], 0
    while k < n_groups:
        size = max(least, -(-(n_groups - k) // per_slot))
        out.append(list(range(k, min(n_groups, k + size))))
        k += size
    return out


def measure_groups(pl: Plan, reqs, positions: Iterable[int]) -> list:
    """Measure the groups at ``positions`` of plan ``pl`` (one task of a worker): a list of
    per-group outputs for :func:`collect_groups`.  ``reqs`` as :func:`resolve_requests`
    gives them."""
    return [_measure_group(pl, pl.groups[k], reqs) for k in positions]


def collect_groups(pl: Plan, reqs, outs) -> FamilyResult:
    """The :class:`FamilyResult` of per-group outputs (:func:`measure_groups`) given in plan
    order: the same object ``measure_family`` returns for the whole family."""
    return _collect(pl, reqs, outs)


#: metrics whose kernels read only the group's closed-loop batches (time responses): a group
#: that pools clusters of close resonances computes them once over the pool
_POOLED = frozenset({"rise_time", "settling_time", "overshoot", "undershoot", "peak_time",
                     "peak_effort", "disturbance_peak", "disturbance_recovery",
                     "disturbance_offset"})


def _measure_group(pl: Plan, gp, reqs) -> tuple:
    """Build one planned group and measure every request on it.

    A group that pools clusters (:attr:`~ledger.engine.loop.GroupPlan.clusters`) is built
    cluster by cluster: each cluster's stability and frequency metrics on its own grid, the
    time-response metrics of :data:`_POOLED` once over the pool (cluster by cluster again if
    that raises, so an error stays with the variants of its cluster).

    Returns ``(index, (counts, reasons, method), {key: (values, errors, unstable)})`` with
    values over the group's variants and errors as (family index, reason) pairs."""
    from .kernels import _GroupContext
    from .stability import group_stability

    parts = gp.parts()
    built = []
    for sub in parts:
        g = pl.build(sub)
        counts, reasons, method = group_stability(g, pl.dt, pl.variants)
        built.append((g, counts, reasons, method, {}))
    pooled = len(parts) > 1
    out = {}
    for name, full, key in reqs:
        if name == "stable":
            continue
        mdef = METRICS[name]
        masks = [(b[1] == 0) if mdef.needs_stable else np.ones(b[0].index.size, bool)
                 for b in built]
        res = None
        if (pooled and name in _POOLED and any(m.any() for m in masks)
                and (full.get("time_basis", "samples") == "samples" or pl.dt is None)):
            res = _run_pool(pl, built, masks, name, full, mdef)
        if res is None:
            res = [_run(pl, b, m, name, full, mdef, _GroupContext) for b, m in zip(built, masks)]
        out[key] = (np.concatenate([r[0] for r in res]), [e for r in res for e in r[1]],
                    any(r[2] for r in res))
    index = np.concatenate([b[0].index for b in built])
    counts = np.concatenate([b[1] for b in built])
    reasons = [r for b in built for r in b[2]]
    method = "nyquist" if any(b[3] == "nyquist" for b in built) else built[0][3]
    return index, (counts, reasons, method), out


def _run(pl, b, ok, name, full, mdef, context) -> tuple:
    """One request on one built cluster ``b`` (LoopGroup, counts, reasons, method, contexts)
    under the mask ``ok``: (values over the cluster, errors, unstable)."""
    g, counts, reasons, _, contexts = b
    vals_g = np.full(g.index.size, np.inf * mdef.worst_sign())
    errors: list = []
    unstable = False
    for j in np.flatnonzero(~ok):
        errors.append((int(g.index[j]), reasons[j]))
        unstable = True
    if np.any(ok):
        ckey = ok.tobytes()
        if ckey not in contexts:
            contexts[ckey] = context(pl, g, ok, counts == 0)
        ctx = contexts[ckey]
        try:
            vals = _values(ctx, name, full)
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
    return vals_g, errors, unstable


def _values(ctx, name, full) -> np.ndarray:
    from .kernels import _COMPUTE
    return np.asarray(_COMPUTE[name](ctx, full), dtype=float).reshape(-1)


def _run_pool(pl, built, masks, name, full, mdef) -> list | None:
    """One pooled request over every cluster of a group at once: per cluster (values, errors,
    unstable) as :func:`_run` gives them, or ``None`` when the pooled kernel raises (the caller
    then measures cluster by cluster)."""
    from .kernels import _PoolContext

    ckey = ("pool",) + tuple(m.tobytes() for m in masks)
    contexts = built[0][4]
    if ckey not in contexts:
        contexts[ckey] = _PoolContext(pl, [b[0] for b in built], masks)
    try:
        vals = _values(contexts[ckey], name, full)
    except LedgerError:
        return None
    res = []
    k = 0
    for (g, counts, reasons, _, _), ok in zip(built, masks):
        vals_g = np.full(g.index.size, np.inf * mdef.worst_sign())
        errors = [(int(g.index[j]), reasons[j]) for j in np.flatnonzero(~ok)]
        pos = np.flatnonzero(ok)
        v = vals[k:k + pos.size]
        k += pos.size
        nan = np.isnan(v)
        vals_g[pos[~nan]] = v[~nan]
        errors += [(int(i), "the value could not be computed (NaN)") for i in g.index[pos[nan]]]
        res.append((vals_g, errors, bool((~ok).any())))
    return res


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
    return measure_groups(_WORKER["plan"], _WORKER["reqs"], positions)


def _measure_parallel(pl: Plan, reqs, workers: int) -> list:
    """Groups measured in ``workers`` processes, a few groups per task, results in plan
    order."""
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    n = len(pl.groups)
    workers = min(workers, n)
    # tasks shrink towards the end (task_groups) so the workers finish together; the first
    # ones carry many groups so the round trips stay few
    tasks = task_groups(n, workers)
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
        ``discretization`` = ``controller_discretization``: ``"zoh"``, ``"tustin"``,
        ``"tustin@W"``, ``"matched"``) and metric settings (``amplitude`` or
        ``step_amplitude``, ``settling_band``, ``settling_basis``, ``rise_limits``,
        ``frequency``, ``band``, ``time_basis``), applied to every requested metric that
        takes them.

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
        if not any(key in METRICS[n].accepts for n in names):
            raise SpecError(f"setting {key!r} ({SETTING_DOCS[key]}) is used by none of the "
                            f"requested metrics: {', '.join(names)}")
    from .loop import LoopSpec

    loop = LoopSpec(**loop_kw)
    family = _as_family(plant, loop.sample_time)
    controller = _as_controller(controller, loop.sample_time)
    requests = [(n, {k: v for k, v in metric_kw.items() if k in METRICS[n].accepts})
                for n in names]
    result = measure_family(family, controller, loop, requests)
    keys = {n: request_key(n, resolve_settings(n, s)) for n, s in requests}
    return Measurement(result=result, request_keys=MappingProxyType(keys))
