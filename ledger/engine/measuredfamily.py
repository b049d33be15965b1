"""Families with measured members: the model members measured as usual, the measured ones by
:mod:`ledger.engine.measured`, the results put back together in family order so worst case,
worst variant and pass fraction cover both."""

from __future__ import annotations

from types import MappingProxyType

import numpy as np

from ..errors import LedgerError, UnstableLoopError
from ..systems.variants import PlantFamily
from .metrics import METRICS
from .results import FamilyResult, MetricResult

__all__ = ["measure_mixed", "measured_names"]


def measured_names(family: PlantFamily) -> tuple:
    """Names of the measured members of a family."""
    return tuple(v.name for v in family.variants if v.kind == "measured")


def _measured_one(variant, controller, loop, reqs):
    """(stable or None, reason, {key: (value, error or None, unstable)}) of one member."""
    from .measured import MeasuredLoop, measured_metric, _count_poles

    out = {}
    try:
        ml = MeasuredLoop(variant.system, controller, loop, variant.delay)
        z = ml.nyquist_unstable()
        _, pf = _count_poles(loop.prefilter)
        z += pf
        stable, reason = z == 0, ("" if z == 0 else
                                  f"{z} closed-loop pole(s) in the right half plane "
                                  f"(Nyquist on measured data)")
    except LedgerError as e:
        ml, stable, reason = None, None, str(e)
    for name, full, key in reqs:
        if name == "stable":
            out[key] = ((float(stable), None, False) if stable is not None
                        else (np.nan, reason, False))
            continue
        if ml is None:
            out[key] = (np.nan, reason, False)
            continue
        try:
            if METRICS[name].needs_stable and stable is None:
                raise UnstableLoopError(reason)
            out[key] = (measured_metric(ml, name, full, bool(stable)), None, False)
        except LedgerError as e:
            out[key] = (np.nan, str(e), isinstance(e, UnstableLoopError))
    return stable, reason, out


def measure_mixed(family: PlantFamily, controller, loop, reqs, run_models) -> FamilyResult:
    """Measure ``reqs`` (name, settings, key) on a family with measured members;
    ``run_models(subfamily)`` measures the model members (a :class:`FamilyResult`)."""
    from .stability import StabilityReport

    names = family.names
    V = len(names)
    models = [v for v in family.variants if v.kind != "measured"]
    pos_model = [i for i, v in enumerate(family.variants) if v.kind != "measured"]
    sub = run_models(PlantFamily(tuple(models))) if models else None
    stable = np.zeros(V, bool)
    counts = np.zeros(V, int)
    reasons = [""] * V
    values = {key: np.full(V, np.inf * METRICS[name].worst_sign()) for name, _, key in reqs}
    errors = {key: {} for _, _, key in reqs}
    unstable = {key: False for _, _, key in reqs}
    method = "nyquist"
    if sub is not None:
        for j, i in enumerate(pos_model):
            stable[i] = sub.stability.stable[j]
            counts[i] = sub.stability.unstable_poles[j]
            reasons[i] = sub.stability.reasons[j]
        for name, _, key in reqs:
            r = sub.results[key]
            values[key][pos_model] = r.values
            for vname, why in r.variant_errors.items():
                errors[key][vname] = why
            unstable[key] = r.unstable
    for i, v in enumerate(family.variants):
        if v.kind != "measured":
            continue
        st, why, per = _measured_one(v, controller, loop, reqs)
        stable[i] = bool(st)
        counts[i] = 0 if st else 1
        reasons[i] = why
        for name, _, key in reqs:
            val, err, uns = per[key]
            if err is None:
                values[key][i] = val
            else:
                errors[key][v.name] = err
                unstable[key] = unstable[key] or uns
    stab = StabilityReport(stable=stable, unstable_poles=counts, method=method,
                           reasons=tuple(reasons))
    results = {}
    order = {n: k for k, n in enumerate(names)}
    for name, full, key in reqs:
        errs = dict(sorted(errors[key].items(), key=lambda e: order[e[0]]))
        results[key] = MetricResult(name=name, settings=full, key=key, values=values[key],
                                    variant_errors=errs, unstable=unstable[key],
                                    variants=names)
    return FamilyResult(variants=names, results=MappingProxyType(results), stability=stab)
