"""What drives the worst case: the slope of each requirement's worst value in every toleranced
plant parameter, at the variant that gave the worst value, ranked.

For one revision and its current results (latest requirement and plant versions), each
requirement's worst variant is read from the family's cached metric values (as ``verify``
judged it).  Its plant is rebuilt from the plant's model text with one toleranced parameter
moved by ``k h`` (``k = -2..2``, ``h = step x (high - low)``) and measured alone by the engine
(``measure_family`` on a one-variant family, the same controller and loop), and the five
values give the slope, its truncation and rounding estimates and a smoothness check
(:mod:`.stencil`).  The slope is scaled to the tolerance: "value change per tolerance width"
``= d value / d p x (high - low)``.  For a corner the other corner across each parameter is
read from the cached family values.  Nothing is stored: computed on demand (docs/history.md,
"What drives the worst case").
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterable

import numpy as np

from ..config import SENSITIVITY_KINK_RTOL, SENSITIVITY_STEP, SENSITIVITY_VALUE_RTOL
from ..errors import LedgerError, NotFoundError, UsageError
from ..history.matrix import CAUTION
from .compute import controller_for, family_for, judge_payload, loop_spec_for
from .plan import Check, RevisionPlan, plan_revision
from .stencil import OFFSETS, Slope, slope_from

__all__ = ["ParameterEffect", "WorstCaseDrivers", "worst_case_drivers", "drivers_of"]


@dataclass(frozen=True)
class ParameterEffect:
    """How one toleranced parameter moves a requirement's worst value.

    Attributes
    ----------
    parameter : str
    low, nominal, high : float
        The parameter's tolerance band (its own unit).
    at : float
        Its value at the worst variant.
    place : str
        Where that is in the band: ``low``, ``high``, ``nominal`` or ``inside``.
    status : str
        ``smooth``, ``not smooth``, ``one-sided``, ``infinite``, ``cannot`` (see
        :class:`~ledger.verification.stencil.Slope`), ``steps`` (the value does not change
        within two steps but does across the band: it moves in steps, e.g. a time read at
        the sample instants of a digital loop; the slope is 0 here and says little) or
        ``not used`` (the worst variant's model does not use the parameter: no effect).
    derivative : float or None
        d value / d parameter (metric unit per parameter unit), smooth only.
    per_width : float or None
        ``derivative x (high - low)``: value change per tolerance width (metric unit).
    truncation, rounding : float or None
        Error estimates of ``per_width``.
    forward, backward : float or None
        One-sided slopes per tolerance width (above and below the worst variant).
    worse_when : str
        ``higher`` or ``lower``: the direction of the parameter that takes headroom away
        ("" when it has no measurable effect or the sides disagree).
    value_low, value_high : float or None
        The value with this parameter at the low / high end of its band and every other
        parameter as at the worst variant: for a corner, the worst value itself and the
        cached value of the corner across (``other_corner_variant``); otherwise both measured
        alone.  ``across`` is their difference, the change over the whole band.
    step : float
        The step h in the parameter's unit.
    note : str
    """

    parameter: str
    low: float
    nominal: float
    high: float
    at: float
    place: str
    status: str
    derivative: float | None = None
    per_width: float | None = None
    truncation: float | None = None
    rounding: float | None = None
    forward: float | None = None
    backward: float | None = None
    worse_when: str = ""
    value_low: float | None = None
    value_high: float | None = None
    other_corner_variant: str = ""
    step: float = 0.0
    note: str = ""

    @property
    def across(self) -> float | None:
        """``value_high - value_low``: the change over the whole band (None if either end
        is missing or infinite)."""
        if self.value_low is None or self.value_high is None:
            return None
        d = self.value_high - self.value_low
        return d if math.isfinite(d) else None

    @property
    def magnitude(self) -> float:
        """What the ranking orders by: ``|per_width|``, else the larger one-sided slope."""
        if self.per_width is not None:
            return abs(self.per_width)
        sides = [abs(x) for x in (self.forward, self.backward) if x is not None]
        return max(sides) if sides else -1.0

    def rank_key(self) -> tuple:
        """Largest local change first; ties (e.g. zero slopes of a value that moves in whole
        sample periods) by the change over the band."""
        return (-self.magnitude, -abs(self.across or 0.0))

    @property
    def error(self) -> float:
        """The estimated error of :attr:`magnitude` (truncation + rounding; 0 when unknown)."""
        return (self.truncation or 0.0) + (self.rounding or 0.0)


def ranked(effects: list[ParameterEffect]) -> list[ParameterEffect]:
    """``effects`` (in the plant's parameter order) ranked by :meth:`ParameterEffect.rank_key`;
    effects whose magnitudes agree within their estimated errors (e.g. K and tau of
    K/(s(tau s+1)) with equal relative tolerances, whose effects on the damping are the same)
    are a tie and keep the plant's order, so that rounding never decides the ranking."""
    order = {e.parameter: k for k, e in enumerate(effects)}
    out = sorted(effects, key=ParameterEffect.rank_key)
    groups: list[list[ParameterEffect]] = []
    for e in out:
        g = groups[-1] if groups else None
        if g and g[-1].magnitude >= 0 and e.magnitude >= 0 and \
                g[-1].magnitude - e.magnitude <= g[-1].error + e.error:
            g.append(e)
        else:
            groups.append([e])
    return [e for g in groups for e in sorted(g, key=lambda x: order[x.parameter])]


@dataclass(frozen=True)
class WorstCaseDrivers:
    """What drives one requirement's worst value on one revision.

    ``effects`` is ranked, largest value change per tolerance width first (parameters whose
    slope could not be taken last).  ``note`` says why there are none, when there are none.
    """

    loop: str
    revision: str
    requirement: str
    version: int
    metric: str
    unit: str
    limit_text: str
    comparator: str
    verdict: str
    value: float | None
    worst_variant: str
    variant_kind: str
    recomputed: float | None
    step: float
    effects: tuple[ParameterEffect, ...] = ()
    note: str = ""
    caution: str = CAUTION
    #: the toleranced parameters in the plant's order (the order of corner lines)
    parameters: tuple[str, ...] = ()

    def corner_directions(self) -> dict[str, str]:
        """Parameter -> ``low``/``high`` of the worst corner (empty unless it is a corner), in
        the plant's parameter order."""
        if self.variant_kind != "corner":
            return {}
        return {e.parameter: e.place for e in sorted(self.effects, key=self._declared)
                if e.place in ("low", "high")}

    def _declared(self, e: ParameterEffect) -> int:
        return self.parameters.index(e.parameter) if e.parameter in self.parameters else 0


def worst_case_drivers(lg, loop: str, label: str | None = None,
                       keys: Iterable[str] | None = None, *, step: float = SENSITIVITY_STEP,
                       kink_rtol: float = SENSITIVITY_KINK_RTOL,
                       value_rtol: float = SENSITIVITY_VALUE_RTOL) -> list[WorstCaseDrivers]:
    """What drives the worst value of each requirement (or of ``keys``) on a revision.

    Parameters
    ----------
    lg : Ledger
    loop : str
    label : str, optional
        Revision label (default: the loop's tip).
    keys : iterable of str, optional
        Requirement IDs (default: every requirement that applies to the loop).
    step : float
        Finite-difference step as a fraction of each parameter's tolerance width (default
        0.01).
    kink_rtol, value_rtol : float
        As for :func:`ledger.verification.stencil.slope_from`.

    Returns
    -------
    list of WorstCaseDrivers
        In the order of the requirements.

    Raises
    ------
    NotFoundError
        Unknown loop, revision or requirement, or a requirement that does not apply here.
    UsageError
        A step outside (0, 0.25].
    """
    from ..store import loops as loops_db
    from ..store import results as results_db
    from ..store import revisions as rev_db

    if not (isinstance(step, (int, float)) and 0 < step <= 0.25):
        raise UsageError(f"the step must be a fraction of the tolerance width in (0, 0.25], "
                         f"got {step!r}")
    keys = list(keys) if keys is not None else None
    with lg.store.reading() as s:
        lp = loops_db.loop_row(s, loop)
        rev = rev_db.revision_or_tip(s, lp, label)
        plan = plan_revision(s, lp, revision=rev, keys=keys, missing_only=False)
        cached = results_db.load_cached(s, plan.keys())
    for key in keys or ():
        if key not in {c.key for c in plan.checks}:
            info = lg.requirement(key)  # NotFoundError for an unknown ID
            why = ("has no metric of its own" if not info.metric else
                   "is retired" if info.status == "retired" else
                   f"does not apply to loop {loop!r}")
            raise NotFoundError(f"requirement {key!r} {why}: nothing to trace")
    return drivers_of(plan, cached, step=step, kink_rtol=kink_rtol, value_rtol=value_rtol)


def _shell(plan: RevisionPlan, c: Check, step: float, **kw) -> WorstCaseDrivers:
    base = dict(loop=plan.loop, revision=plan.label or "", requirement=c.key,
                version=c.version, metric=c.metric, unit=c.unit, limit_text=c.limit_text,
                comparator=c.comparator, verdict="", value=None, worst_variant="",
                variant_kind="", recomputed=None, step=step)
    base.update(kw)
    return WorstCaseDrivers(**base)


def drivers_of(plan: RevisionPlan, cached: dict, *, step: float = SENSITIVITY_STEP,
               kink_rtol: float = SENSITIVITY_KINK_RTOL,
               value_rtol: float = SENSITIVITY_VALUE_RTOL) -> list[WorstCaseDrivers]:
    """:func:`worst_case_drivers` of a plan and its cached payloads (no session)."""
    from ..systems import ParamSpec

    specs = {n: ParamSpec.from_value(v) for n, v in plan.plant_spec["params"].items()}
    out: dict[int, WorstCaseDrivers] = {}
    todo: dict[str, list[tuple[int, Check, object, dict]]] = {}
    fam = None
    for i, c in enumerate(plan.checks):
        payload = cached.get(plan.metric_key(c.metric, c.settings))
        if payload is None:
            out[i] = _shell(plan, c, step, note="no current result (stale or not verified): "
                            "run `loopledger verify` first")
            continue
        j = judge_payload(c, payload)
        head = dict(verdict=j.verdict, value=j.value, worst_variant=j.worst_variant)
        if j.value is None:
            out[i] = _shell(plan, c, step, **head, note=f"no worst value to trace: {j.reason}")
            continue
        if c.unit == "bool":
            out[i] = _shell(plan, c, step, **head, note="a yes/no metric has no slope")
            continue
        if fam is None:
            fam = family_for(plan)
        var = next(v for v in fam.variants if v.name == j.worst_variant)
        head["variant_kind"] = var.kind
        if var.kind == "measured":
            out[i] = _shell(plan, c, step, **head, note="the worst variant is measured data: "
                            "it has no parameters to vary")
            continue
        if not any(s.has_tolerance for s in specs.values()):
            out[i] = _shell(plan, c, step, **head, note="the plant has no toleranced parameter")
            continue
        todo.setdefault(var.name, []).append((i, c, var, payload))
    if todo:
        try:
            controller, loop = controller_for(plan), loop_spec_for(plan)
        except LedgerError as e:
            controller = loop = e
        for name, items in todo.items():
            for i, d in _variant_drivers(plan, fam, specs, items, controller, loop, step,
                                         kink_rtol, value_rtol):
                out[i] = d
    return [out[i] for i in range(len(plan.checks))]


def _model_text(plan: RevisionPlan, var) -> str:
    if var.kind == "fidelity":
        return plan.plant_spec["fidelity"][var.name.split(":", 1)[1]]
    return plan.plant_spec["model"]


def _measure_point(text: str, values: dict, sample_time, controller, loop, requests,
                   name: str):
    """[(value or None, error)] per request for the plant ``text`` at ``values``, measured
    alone as a variant called ``name``."""
    from dataclasses import replace

    from ..engine.measure import measure_family
    from ..systems import build_family
    from ..systems.variants import PlantFamily

    try:
        one = build_family(text, values, corners=False, sample_time=sample_time).variants[0]
        fam = PlantFamily((replace(one, name=name),))
        res = measure_family(fam, controller, loop, requests)
    except LedgerError as e:
        return [(None, str(e))] * len(requests)
    out = []
    for metric, settings in requests:
        r = res.get(metric, settings)
        if r.variant_errors:
            out.append((None, next(iter(r.variant_errors.values()))))
        else:
            out.append((float(r.values[0]), ""))
    return out


def _variant_drivers(plan, fam, specs, items, controller, loop, step, kink_rtol, value_rtol):
    """(check index, WorstCaseDrivers) of the checks whose worst variant is ``items``'s."""
    from ..systems import compile_model

    _, _, var, _ = items[0]
    text = _model_text(plan, var)
    used = compile_model(text).parameters
    at = {n: float(var.params.get(n, s.nominal)) for n, s in specs.items()}
    requests = [(c.metric, c.settings) for _, c, _, _ in items]
    st = plan.plant_spec["sample_time"]
    if isinstance(controller, LedgerError):
        for i, c, _, payload in items:
            j = judge_payload(c, payload)
            yield i, _shell(plan, c, step, verdict=j.verdict, value=j.value,
                            worst_variant=var.name, variant_kind=var.kind,
                            note=f"the loop cannot be assembled: {controller}")
        return
    center = _measure_point(text, at, st, controller, loop, requests, var.name)
    toleranced = [n for n, s in specs.items() if s.has_tolerance]
    points = {}
    for n in toleranced:
        if n not in used:
            continue
        h = step * (specs[n].high - specs[n].low)
        for k in OFFSETS:
            if k:
                x = at[n] + k * h
                points[(n, k)] = _measure_point(text, {**at, n: x}, st, controller, loop,
                                                requests, f"{var.name} with {n}={x:.6g}")
        if not (var.kind == "corner" and _place(specs[n], at[n]) in ("low", "high")):
            for end in ("low", "high"):  # a corner's ends are in the cached family values
                x = getattr(specs[n], end)
                points[(n, end)] = _measure_point(text, {**at, n: x}, st, controller, loop,
                                                  requests, f"{var.name} with {n}={x:.6g}")
    for q, (i, c, _, payload) in enumerate(items):
        j = judge_payload(c, payload)
        effects = []
        for n in toleranced:
            near = {k: points[(n, k)][q] for k in OFFSETS if k and (n, k) in points}
            ends = {e: points[(n, e)][q] for e in ("low", "high") if (n, e) in points}
            effects.append(_effect(n, specs[n], at[n], var, fam, payload, c, step, used,
                                   center[q], near, ends, kink_rtol, value_rtol))
        effects = ranked(effects)
        f0, err0 = center[q]
        note = ""
        if f0 is None:
            note = f"the worst variant measured alone cannot be computed: {err0}"
        elif j.value is not None and not _close(f0, j.value):
            note = (f"measured alone the worst variant gives {f0:.6g} (the family's value "
                    f"{j.value:.6g}); the slopes are of the value measured alone")
        vals = [float(v) for v in payload["values"]]
        if len(vals) > 1 and all(math.isfinite(v) for v in vals) and \
                max(vals) - min(vals) <= 1e-9 * max(abs(v) for v in vals):
            note = (note + "; " if note else "") + (
                "every variant of the family gives this value to 1e-9: the worst variant is "
                "one of equals")
        yield i, _shell(plan, c, step, verdict=j.verdict, value=j.value,
                        worst_variant=var.name, variant_kind=var.kind, recomputed=f0,
                        effects=tuple(effects), note=note, parameters=tuple(toleranced))


def _close(a: float, b: float) -> bool:
    if math.isinf(a) or math.isinf(b):
        return a == b
    return abs(a - b) <= 1e-6 * max(abs(a), abs(b), 1e-300)


def _place(spec, value: float) -> str:
    if value == spec.high:
        return "high"
    if value == spec.low:
        return "low"
    if value == spec.nominal:
        return "nominal"
    return "inside"


def _headroom_sign(c: Check, value: float, slope: float) -> float:
    """Sign of the headroom's change when the value changes by ``slope``."""
    if c.comparator in ("<=", "<"):
        return -np.sign(slope)
    if c.comparator in (">=", ">"):
        return np.sign(slope)
    return -np.sign(value - c.limit_value) * np.sign(slope)


def _worse_when(c: Check, value: float, slopes, noise: float) -> str:
    """``higher``/``lower``: the parameter direction that takes headroom away, from the
    slopes above the noise; "" when none is, or when they disagree."""
    signs = {float(_headroom_sign(c, value, s)) for s in slopes
             if s is not None and abs(s) > noise}
    if len(signs) != 1:
        return ""
    return "higher" if signs.pop() < 0 else "lower"


def _ends(fam, var, name: str, spec, payload, ends: dict) -> tuple:
    """(value at low, value at high, the corner across or "") of parameter ``name``."""
    if var.kind == "corner" and _place(spec, var.params[name]) in ("low", "high"):
        here = var.params[name]
        want = spec.low if here == spec.high else spec.high
        worst = _decoded(payload, var.name)
        for v in fam.variants:
            if v.kind == "corner" and v.params[name] == want and all(
                    v.params[k] == var.params[k] for k in var.params if k != name):
                other = _decoded(payload, v.name)
                return ((other, worst) if here == spec.high else (worst, other)) + (v.name,)
        return None, None, ""
    lo, hi = ends.get("low", (None, "")), ends.get("high", (None, ""))
    return lo[0], hi[0], ""


def _decoded(payload, name: str) -> float:
    return float(payload["values"][payload["variants"].index(name)])


def _effect(name, spec, at, var, fam, payload, c, step, used, center, around, ends, kink_rtol,
            value_rtol) -> ParameterEffect:
    width = spec.high - spec.low
    base = dict(parameter=name, low=spec.low, nominal=spec.nominal, high=spec.high, at=at,
                place=_place(spec, at), step=step * width)
    if name in used:
        lo, hi, other = _ends(fam, var, name, spec, payload, ends)
        base.update(value_low=lo, value_high=hi, other_corner_variant=other)
    if name not in used:
        return ParameterEffect(**base, status="not used", derivative=0.0, per_width=0.0,
                               truncation=0.0, rounding=0.0,
                               note=f"the model of {var.name} does not use {name}")
    values = {0: center[0], **{k: v for k, (v, _) in around.items()}}
    errors = {k: e for k, (v, e) in {0: center, **around}.items() if v is None}
    sl: Slope = slope_from(values, step * width, errors=errors, kink_rtol=kink_rtol,
                           value_rtol=value_rtol)

    def scaled(x):
        return None if x is None else x * width

    f0 = center[0]
    noise = (sl.rounding or 0.0) * width
    if sl.status == "smooth":
        worse = _worse_when(c, f0, [sl.derivative * width], noise)
    elif f0 is not None:
        worse = _worse_when(c, f0, [scaled(sl.forward), scaled(sl.backward)],
                            8 * value_rtol * abs(f0) / step)
    else:
        worse = ""
    note = sl.note
    if f0 is not None and math.isfinite(f0):
        from ..judge import passes_array

        near = [v for k, v in values.items() if k and v is not None and math.isfinite(v)]
        flips = passes_array(c.comparator, near, c.limit_value) != bool(
            passes_array(c.comparator, [f0], c.limit_value)[0])
        if near and flips.any():
            note = (note + "; " if note else "") + ("the verdict flips within two steps: the "
                                                    "value crosses the limit here")
    across = None if base.get("value_low") is None or base.get("value_high") is None else \
        base["value_high"] - base["value_low"]
    status = sl.status
    if sl.status == "smooth" and sl.derivative == 0 and across and math.isfinite(across):
        status = "steps"
        note = ("the value does not change within two steps but does across the band: it "
                "moves in steps (e.g. whole sample periods)")
    if var.kind == "corner" and base["place"] in ("low", "high") and worse:
        outward = (base["place"] == "high") == (worse == "higher")
        if not outward:
            note = (note + "; " if note else "") + (
                f"the value gets worse moving {name} into the band from this corner: the "
                "worst over this parameter may lie between its corners")
    return ParameterEffect(**base, status=status, derivative=sl.derivative,
                           per_width=scaled(sl.derivative), truncation=scaled(sl.truncation),
                           rounding=scaled(sl.rounding), forward=scaled(sl.forward),
                           backward=scaled(sl.backward), worse_when=worse, note=note)
