"""Computing: metric values of a plan over the plant family and the verdicts they give.

No database here: a plan (:mod:`ledger.verification.plan`) and the cached payloads in, the
payloads (JSON-able) out.  This is what worker processes run.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..config import FAMILY_CACHE_SIZE
from ..errors import LedgerError, ModelError
from ..judge import headroom_array, judge, passes_array
from ..units import Limit
from .plan import Check, RevisionPlan

__all__ = ["family_for", "clear_family_cache", "loop_spec_for", "controller_for",
           "validate_controller", "compute_plan", "compute_plans", "Judged", "judge_payload",
           "compute_requests", "missing_requests", "engine_plan_for", "error_payload",
           "result_payload"]

_FAMILIES: dict[tuple, object] = {}


def family_for(plan: RevisionPlan):
    """The plant family of the plan's plant version (memoised by content hash and parameter
    order: the order names the corners)."""
    memo = (plan.plant_hash, tuple(plan.plant_spec["params"]))
    fam = _FAMILIES.get(memo)
    if fam is None:
        from ..systems import build_family

        p = plan.plant_spec
        fam = build_family(p["model"], p["params"], corners=True, samples=p["samples"],
                           seed=p["seed"], fidelity=p["fidelity"], sample_time=p["sample_time"],
                           measured=p.get("measured"))
        if len(_FAMILIES) > FAMILY_CACHE_SIZE:
            _FAMILIES.clear()
        _FAMILIES[memo] = fam
    return fam


def clear_family_cache() -> None:
    """Forget the plant families (and their group plans) built in this process."""
    _FAMILIES.clear()
    _ENGINE_PLANS.clear()


def loop_spec_for(plan: RevisionPlan):
    from ..engine.loop import LoopSpec
    from ..systems import parse_model

    f = plan.loop_form
    ts = f["sample_time"]

    def block(text, what):
        if not text:
            return None
        ev = parse_model(text, sample_time=ts)
        if ev.delay:
            raise ModelError(f"the loop's {what} has a delay; give it as a loop delay instead")
        return ev.system

    reference = None
    if plan.number_format and ts is not None:
        # the controller before quantisation: the design, discretised by its method
        from ..digital import digital_form

        text = digital_form(plan.design_text, ts,
                            discretization=plan.discretization).verified_text or plan.design_text
        reference = parse_model(text, sample_time=ts).system
    spectra = ()
    if f.get("spectra"):
        from ..spectra_io import engine_spectrum

        spectra = tuple(engine_spectrum(sp, ts) for sp in f["spectra"])
    d = plan.design or {}
    # precedence (docs/models.md): the revision's own prefilter, else the loop's
    own = d.get("prefilter_text") or ""
    prefilter = block(own, "revision prefilter") if own else block(f["prefilter"], "prefilter")
    return LoopSpec(sensor=block(f["sensor"], "sensor"), prefilter=prefilter,
                    input_delay=f["input_delay"], output_delay=f["output_delay"],
                    sample_time=ts, computation_delay=f["computation_delay"],
                    actuator_limit=f["actuator_limit"], reference_controller=reference,
                    spectra=spectra, rate_limit=f.get("rate_limit"),
                    anti_windup=d.get("anti_windup") or "none",
                    anti_windup_gain=d.get("anti_windup_gain"))


def controller_for(plan: RevisionPlan):
    from ..systems import parse_model

    ev = parse_model(plan.controller_text, sample_time=plan.loop_form["sample_time"])
    if ev.delay:
        raise ModelError("the controller text has a delay; give loop delays on the loop")
    return ev.system


def validate_controller(plan: RevisionPlan) -> None:
    """Refuse a controller that cannot close this loop at all (improper, wrong sample time,
    algebraic loop), with the engine's reason."""
    from ..engine.loop import assemble
    from ..engine.types import PlantFamily

    fam = family_for(plan)
    assemble(PlantFamily((fam.variants[0],)), controller_for(plan), loop_spec_for(plan))


def _encode(values: np.ndarray) -> list:
    return [("inf" if v > 0 else "-inf") if math.isinf(v) else float(v) for v in values]


def _decode(values: list) -> np.ndarray:
    return np.array([float(v) for v in values], dtype=float)


def error_payload(metric: str, variants, reason: str) -> dict:
    """The payload of a request that could not be computed for the whole family."""
    return {"metric": metric, "variants": list(variants), "values": [],
            "errors": {"*": reason}, "unstable": False}


def result_payload(r) -> dict:
    """The payload (JSON-able) of one engine ``MetricResult``."""
    return {"metric": r.name, "variants": list(r.variants), "values": _encode(r.values),
            "errors": dict(r.variant_errors), "unstable": bool(r.unstable)}


def compute_requests(plan: RevisionPlan, requests: list[tuple[str, dict]], *,
                     workers: int = 1) -> list[dict]:
    """Payloads of (metric, settings) ``requests`` over the plan's whole family, in order, from
    one batched ``measure_family`` call (its family split over ``workers`` processes when
    > 1).  A loop the engine refuses gives every request an error payload with the reason."""
    from ..engine.measure import measure_family

    fam = family_for(plan)
    try:
        res = measure_family(fam, controller_for(plan), loop_spec_for(plan), requests,
                             workers=workers)
    except LedgerError as e:
        return [error_payload(metric, fam.names, str(e)) for metric, _ in requests]
    return [result_payload(res.get(metric, settings)) for metric, settings in requests]


def missing_requests(plan: RevisionPlan, cached: dict[str, dict]) -> dict[str, tuple[str, dict]]:
    """(metric, settings) by metric key of every check whose values are not in ``cached``."""
    todo: dict[str, tuple[str, dict]] = {}
    for c in plan.checks:
        k = plan.metric_key(c.metric, c.settings)
        if k not in cached:
            todo[k] = (c.metric, c.settings)
    return todo


def compute_plan(plan: RevisionPlan, cached: dict[str, dict], *,
                 workers: int = 1) -> tuple[dict[str, dict], int]:
    """Payloads for every check's metric key: cached ones as given, the rest computed in one
    batched call (its family split over ``workers`` processes when > 1).  Returns (payloads by
    key, number of (metric, settings) requests computed)."""
    payloads = {k: cached[k] for k in plan.keys() if k in cached}
    todo = missing_requests(plan, cached)
    if not todo:
        return payloads, 0
    payloads.update(zip(todo, compute_requests(plan, list(todo.values()), workers=workers)))
    return payloads, len(todo)


_ENGINE_PLANS: dict[tuple, object] = {}


def engine_plan_for(plan: RevisionPlan):
    """The engine's group plan (``ledger.engine.loop.plan``) of the plan's family, controller
    and loop, memoised in this process (a worker measuring chunks of one family plans it once).

    Raises
    ------
    LedgerError
        The loop cannot be assembled (the caller records it as every request's error).
    """
    import json

    memo = (plan.plant_hash, tuple(plan.plant_spec["params"]), plan.controller_canonical,
            json.dumps(plan.loop_form, sort_keys=True))
    pl = _ENGINE_PLANS.get(memo)
    if pl is None:
        from ..engine.loop import plan as group_plan

        pl = group_plan(family_for(plan), controller_for(plan), loop_spec_for(plan))
        if len(_ENGINE_PLANS) >= 4:
            _ENGINE_PLANS.clear()
        _ENGINE_PLANS[memo] = pl
    return pl


def compute_plans(batch: list[tuple[RevisionPlan, dict]]) -> list[tuple[dict, int]]:
    """:func:`compute_plan` for several plans (one task of a worker process)."""
    return [compute_plan(plan, cached) for plan, cached in batch]


@dataclass(frozen=True)
class Judged:
    verdict: str
    value: float | None
    headroom: float | None
    headroom_fraction: float | None
    worst_variant: str
    pass_fraction: float | None
    variants: int
    reason: str
    #: random samples in the family and how many of them pass (``None``: no random samples,
    #: or nothing could be judged)
    samples: int | None = None
    sample_passes: int | None = None


#: members that are no draw from the tolerance distribution and must pass under a yield target
_MUST_PASS = ("nominal", "fidelity", "measured")


def _kind(name: str) -> str:
    head = name.split(":", 1)[0]
    return head if ":" in name and head in ("corner", "sample", "fidelity", "measured") \
        else "nominal"


def _sample_counts(variants, passing) -> tuple[int | None, int | None]:
    idx = [i for i, v in enumerate(variants) if _kind(v) == "sample"]
    if not idx:
        return None, None
    return len(idx), int(np.count_nonzero(np.asarray(passing, dtype=bool)[idx]))


def judge_payload(check: Check, payload: dict) -> Judged:
    """Worst case over the family by the requirement's own comparator; with a yield target,
    the verdict is the lower confidence bound over the random samples (:func:`_yield_verdict`).
    """
    variants = payload["variants"]
    errors = payload.get("errors") or {}
    n = len(variants)
    if check.problem:
        return Judged("error", None, None, None, "", None, n, check.problem)
    unstable = bool(errors) and bool(payload.get("unstable"))
    if errors:
        first_variant, reason = next(iter(errors.items()))
        more = f" (and {len(errors) - 1} more variant(s))" if len(errors) > 1 else ""
        what = ("" if first_variant == "*" else f" on {first_variant}") + f": {reason}{more}"
        if not unstable:
            return Judged("error", None, None, None, first_variant, None, n,
                          f"cannot compute{what}")
    vals = _decode(payload["values"])
    passing = np.zeros(n, dtype=bool)
    if len(vals) == n:
        passing = passes_array(check.comparator, vals, check.limit_value)
        passing &= np.array([v not in errors for v in variants], dtype=bool)
    samples, sample_passes = _sample_counts(variants, passing)
    if unstable:
        jd = Judged("fail", None, None, None, first_variant,
                    1 - len(errors) / n if n else None, n, f"unstable{what}",
                    samples, sample_passes)
    else:
        lim = Limit(check.comparator, check.limit_value, check.unit, check.limit_text)
        h = headroom_array(check.comparator, vals, check.limit_value)
        i = int(np.argmin(h))
        j = judge(lim, float(vals[i]))
        jd = Judged(j.verdict, float(vals[i]), j.headroom, j.headroom_fraction, variants[i],
                    float(passing.mean()), n, "", samples, sample_passes)
    if check.yield_target is None:
        return jd  # every member must pass (the rule without a yield target)
    return _yield_verdict(check, jd, variants, passing)


def _yield_verdict(check: Check, jd: Judged, variants, passing) -> Judged:
    """A yield target decides on the one-sided Clopper-Pearson lower bound of the samples'
    pass probability (failing samples are allowed while the bound meets the target); corners
    are the tolerance box's extremes, which a yield claim accepts, so they do not decide; the
    nominal design model, fidelity models and bench measurements are no draws from the
    distribution and must each pass."""
    from dataclasses import replace

    from ..yieldbound import DEFAULT_CONFIDENCE, bound_percent, lower_bound, samples_needed, \
        yield_text

    conf = check.confidence or DEFAULT_CONFIDENCE
    claim = yield_text(check.yield_target, conf)
    if jd.samples is None:
        return Judged("error", None, None, None, "", None, jd.variants,
                      f"yield target {claim} needs random samples; this plant family has "
                      "none (give the plant samples)")
    failed = [v for v, ok in zip(variants, passing) if not ok and _kind(v) in _MUST_PASS]
    if failed:
        more = f" (and {len(failed) - 1} more)" if len(failed) > 1 else ""
        return replace(jd, verdict="fail", reason=f"yield target {claim}: {failed[0]}{more} "
                       "fails, and the design model, fidelity models and measurements must pass"
                       + (f"; {jd.reason}" if jd.reason else ""))
    bound = lower_bound(jd.sample_passes, jd.samples, conf)
    ok = bound >= check.yield_target
    counts = f"{jd.sample_passes} of {jd.samples} samples pass"
    if ok:
        why = f"yield bound {bound_percent(bound, check.yield_target)} >= {claim} ({counts})"
    else:
        why = (f"yield bound {bound_percent(bound, check.yield_target)} < {claim} ({counts}; "
               f"{samples_needed(check.yield_target, conf)} passing samples with none failing "
               "would support it)")
    return replace(jd, verdict="pass" if ok else "fail",
                   reason=why + (f"; {jd.reason}" if jd.reason else ""))
