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

__all__ = ["measure_mixed", "measured_names", "FIT_METRICS", "model_fit"]

#: metrics comparing a measured member with the design model
FIT_METRICS = ("model_fit", "model_fit_phase")


def model_fit(meas, nominal, frequency: float) -> tuple[float, float]:
    """(largest dB deviation, largest degree deviation) of a measurement from a model over its
    kept points up to ``frequency`` rad/s; the model's own delay included."""
    from .measured import _eval

    keep = meas.used & (meas.omega <= frequency)
    if not keep.any():
        from ..errors import ModelError
        raise ModelError(f"outside measured band: no kept point at or below {frequency:g} "
                         f"rad/s")
    w = meas.omega[keep]
    g_model = _eval(nominal.system, 1j * w) * np.exp(-1j * w * nominal.delay)
    ratio = meas.response[keep] / g_model
    return (float(np.max(np.abs(20 * np.log10(np.abs(ratio))))),
            float(np.max(np.abs(np.angle(ratio, deg=True)))))


def _model_fit(family, fit, values, errors) -> None:
    from ..errors import ModelError

    nominal = family.variants[0]
    has = any(v.kind == "measured" for v in family.variants)
    for name, full, key in fit:
        for i, v in enumerate(family.variants):
            if not has:
                errors[key][v.name] = f"{name} needs a measured member in the family"
            elif v.kind != "measured":
                values[key][i] = 0.0
            elif nominal.kind == "measured":
                errors[key][v.name] = f"{name} needs a model as the family's first member"
            else:
                try:
                    db, deg = model_fit(v.system, nominal, full["frequency"])
                except ModelError as e:
                    errors[key][v.name] = str(e)
                else:
                    values[key][i] = db if name == "model_fit" else deg


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
    fit = [r for r in reqs if r[0] in FIT_METRICS]
    reqs_m = [r for r in reqs if r[0] not in FIT_METRICS]
    from .results import request_key

    only_stable = [("stable", {}, request_key("stable", {}))]
    sub = run_models(PlantFamily(tuple(models)), reqs_m or only_stable) if models else None
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
        for name, _, key in reqs_m:
            r = sub.results[key]
            values[key][pos_model] = r.values
            for vname, why in r.variant_errors.items():
                errors[key][vname] = why
            unstable[key] = r.unstable
    for i, v in enumerate(family.variants):
        if v.kind != "measured":
            continue
        st, why, per = _measured_one(v, controller, loop, reqs_m)
        stable[i] = bool(st)
        counts[i] = 0 if st else 1
        reasons[i] = why
        for name, _, key in reqs_m:
            val, err, uns = per[key]
            if err is None:
                values[key][i] = val
            else:
                errors[key][v.name] = err
                unstable[key] = unstable[key] or uns
    _model_fit(family, fit, values, errors)
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
