"""The rules a record must keep before it is stored: names, numbers, model text, the fields
of a plant, loop or requirement version, and the content hashes computed from them.

Nothing here touches the database: the store (``ledger.store``) calls these checks, then
writes.  Model text is parsed by the grammar in ``ledger.systems`` (never evaluated).
"""

from __future__ import annotations

import json
import math
import re
from typing import Any, Mapping

from .errors import IntegrityViolation, LedgerError, ModelError, with_context
from .hashing import sha256_of

__all__ = ["METHODS", "STATUSES", "LOOP_KINDS", "NAME_RE", "KEY_RE", "check_name", "finite",
           "model_canonical", "param_specs", "plant_fields", "loop_fields",
           "requirement_fields", "requirement_hash", "revision_hash", "PLANT_HASH_FIELDS",
           "plant_content_hash", "ANTI_WINDUP", "design_hash_part", "design_fields"]

METHODS = ("analysis", "test", "inspection", "demonstration")
STATUSES = ("draft", "approved", "retired")
LOOP_KINDS = ("position", "speed", "temperature", "process", "other")
NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,79}$")
KEY_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,39}$")


def check_name(kind: str, name: str, pattern=NAME_RE) -> str:
    if not isinstance(name, str) or not pattern.match(name):
        raise IntegrityViolation(
            f"{kind} name {name!r} is not allowed; use letters, digits, '.', '_' or '-'"
        )
    return name


def finite(name: str, value, *, allow_none=False, minimum=None, strict=False) -> float | None:
    if value is None:
        if allow_none:
            return None
        raise ModelError(f"{name} is required")
    try:
        v = float(value)
    except (TypeError, ValueError) as e:
        raise ModelError(f"{name} must be a number, got {value!r}") from e
    if not math.isfinite(v):
        raise ModelError(f"{name} must be finite, got {value!r}")
    if minimum is not None and (v < minimum or (strict and v == minimum)):
        op = ">" if strict else ">="
        raise ModelError(f"{name} must be {op} {minimum}, got {v}")
    return v


def model_canonical(text: str, *, what: str, sample_time: float | None = None) -> str:
    """Parse model text (no eval) and return its canonical form; raise a one-line error."""
    from .systems import compile_model

    if not isinstance(text, str) or not text.strip():
        raise ModelError(f"{what}: model text is empty")
    try:
        model = compile_model(text)
    except LedgerError as e:
        raise with_context(e, what) from e
    if model.variable == "z" and sample_time is None:
        raise ModelError(f"{what}: a model in z needs a sample time")
    from .systems.bounds import check_model

    check_model(model, what, sample_time)  # representable numbers (docs/models.md)
    return model.canonical


def param_specs(params: Mapping[str, Any] | None, *, what: str) -> dict:
    """Validate parameter specs; return them as JSON-able dicts in the order given."""
    from .systems import ParamSpec

    out = {}
    for name, raw in (params or {}).items():
        try:
            ParamSpec.from_value(raw)
        except LedgerError as e:
            raise with_context(e, f"{what}: parameter {name!r}") from e
        out[str(name)] = raw if not hasattr(raw, "items") else dict(raw)
    return out


#: fields of a plant version that its content hash covers
PLANT_HASH_FIELDS = ("canonical", "parameters_json", "fidelity_json", "samples", "seed",
                     "sample_time", "input_unit", "output_unit")


def plant_content_hash(fields: Mapping[str, Any]) -> str:
    """Content hash of a plant version from its stored fields (a row or a dict).

    ``parameters_json`` keeps the parameters in the order they were given (for display and
    corner names); the hash reads it in canonical form (keys sorted), so the order does not
    change the hash, and every version stored before the order was kept (stored sorted) has the
    same hash as before.  The family's numbers do not depend on the order either (samples are
    drawn in sorted name order), so the hash remains a valid cache key.
    """
    get = fields.get if hasattr(fields, "get") else (lambda k: getattr(fields, k))
    f = {k: get(k) for k in PLANT_HASH_FIELDS}
    f["parameters_json"] = json.dumps(json.loads(f["parameters_json"] or "{}"), sort_keys=True)
    measured = get("measured_json") if _has(fields, "measured_json") else "{}"
    if measured and measured != "{}":
        # only a version with measurements hashes them: every earlier hash stays as it was
        f["measured_json"] = measured
    return sha256_of(f)


def _has(fields, key) -> bool:
    return key in fields if hasattr(fields, "keys") else hasattr(fields, key)


def measured_json(measured, what: str) -> str:
    """Canonical JSON of a plant's measurements (name -> MeasuredResponse or its JSON form)."""
    from .systems.measured import MeasuredResponse

    out = {}
    for name, m in (measured or {}).items():
        check_name("measurement", str(name))
        try:
            m = m if isinstance(m, MeasuredResponse) else MeasuredResponse.from_json(m)
        except LedgerError as e:
            raise with_context(e, f"{what}: measurement {name!r}") from e
        out[str(name)] = m.to_json()
    return json.dumps(out, sort_keys=True, separators=(",", ":"))


def plant_fields(name, model, params, fidelity, samples, seed, sample_time, input_unit,
                 output_unit, measured=None) -> dict:
    """The stored fields of a plant version (content hash included), checked: the model and
    every fidelity model parse, and the family builds."""
    from .systems.bounds import check_seed
    from .units import check_plant_unit

    what = f"plant {name!r}"
    sample_time = finite("sample_time", sample_time, allow_none=True, minimum=0, strict=True)
    canonical = model_canonical(model, what=what, sample_time=sample_time)
    fid = {}
    for fname, ftext in (fidelity or {}).items():
        check_name("fidelity model", str(fname))
        model_canonical(ftext, what=f"{what} fidelity model {fname!r}", sample_time=sample_time)
        fid[str(fname)] = ftext
    samples = int(samples or 0)
    if samples < 0 or samples > 100_000:
        raise ModelError(f"{what}: samples must be between 0 and 100000")
    fields = dict(
        model_text=model,
        canonical=canonical,
        # in the order given (docs/models.md: corners name parameters in that order);
        # the content hash reads it sorted (plant_content_hash)
        parameters_json=json.dumps(param_specs(params, what=what)),
        fidelity_json=json.dumps(fid, sort_keys=True),
        samples=samples,
        seed=check_seed(seed or 0, f"{what}: seed"),
        sample_time=sample_time,
        input_unit=check_plant_unit(input_unit, f"{what}: input unit"),
        output_unit=check_plant_unit(output_unit, f"{what}: output unit"),
        measured_json=measured_json(measured, what),
    )
    # the family must build (parameters present, tolerances sane); fails fast with the reason
    from .systems import build_family
    from .systems.bounds import check_family

    try:
        check_family(build_family(model, json.loads(fields["parameters_json"]), corners=True,
                                  samples=min(samples, 2), seed=fields["seed"], fidelity=fid,
                                  sample_time=sample_time), "model")
    except LedgerError as e:
        raise with_context(e, what) from e
    fields["content_hash"] = plant_content_hash(fields)
    return fields


def loop_fields(name, kind, sensor, prefilter, input_delay, output_delay, sample_time,
                computation_delay, actuator_limit, rate_limit=None) -> dict:
    """The stored fields of a loop, checked."""
    what = f"loop {name!r}"
    if kind not in LOOP_KINDS:
        raise IntegrityViolation(f"{what}: kind {kind!r} is not one of {', '.join(LOOP_KINDS)}")
    sample_time = finite(f"{what}: sample_time", sample_time, allow_none=True, minimum=0,
                         strict=True)
    fields = dict(
        kind=kind,
        sensor_text=sensor or "",
        prefilter_text=prefilter or "",
        input_delay=finite(f"{what}: input_delay", input_delay or 0.0, minimum=0),
        output_delay=finite(f"{what}: output_delay", output_delay or 0.0, minimum=0),
        sample_time=sample_time,
        computation_delay=int(computation_delay or 0),
        actuator_limit=finite(f"{what}: actuator_limit", actuator_limit, allow_none=True,
                              minimum=0, strict=True),
        rate_limit=finite(f"{what}: rate_limit", rate_limit, allow_none=True, minimum=0,
                          strict=True),
    )
    if fields["computation_delay"] < 0:
        raise ModelError(f"{what}: computation_delay must be >= 0 samples")
    if fields["computation_delay"] and sample_time is None:
        raise ModelError(f"{what}: computation_delay needs a sample_time")
    for part in ("sensor_text", "prefilter_text"):
        if fields[part]:
            model_canonical(fields[part], what=f"{what} {part[:-5]}", sample_time=sample_time)
    return fields


def requirement_fields(key: str, *, title, statement, rationale, method, status, metric,
                       settings, limit, parents, loops, plant_units=lambda names: (),
                       yield_claim=None, confidence=None) -> dict:
    """The stored fields of a requirement version, checked (that the parents and loops exist
    is the store's check).  ``yield_claim`` and ``confidence`` (``ledger.yieldbound.
    yield_settings``) are stored among the settings, so they enter the content hash only when
    set.  ``parents`` and ``loops`` come back sorted, without repeats.
    ``plant_units(loop names)`` gives ``(loop, plant input unit, plant output unit)`` for each
    loop, so that a limit is checked against the units of every plant it applies to."""
    what = f"requirement {key!r}"
    if not isinstance(title, str) or not title.strip():
        raise IntegrityViolation(f"{what}: a title is required")
    if not isinstance(statement, str) or not statement.strip():
        raise IntegrityViolation(f"{what}: a statement is required")
    if method not in METHODS:
        raise IntegrityViolation(f"{what}: method {method!r} is not one of {', '.join(METHODS)}")
    if status not in STATUSES:
        raise IntegrityViolation(f"{what}: status {status!r} is not one of {', '.join(STATUSES)}")
    settings = dict(settings or {})
    from .yieldbound import YIELD_KEYS, yield_settings

    reserved = sorted(set(settings) & set(YIELD_KEYS))
    if reserved:
        raise IntegrityViolation(f"{what}: {', '.join(reserved)} is set by the yield claim and "
                                 "confidence, not among the metric settings")
    try:
        claim = yield_settings(yield_claim, confidence)
    except LedgerError as e:
        raise with_context(e, what) from e
    if claim and not metric:
        raise IntegrityViolation(f"{what}: a yield claim or confidence needs a metric")
    comparator = limit_value = None
    limit_text = ""
    if metric:
        from .catalogue import check_settings, metric_unit
        from .units import parse_limit_for

        unit = metric_unit(metric)  # raises for an unknown metric
        try:
            settings = check_settings(metric, settings)
        except LedgerError as e:
            raise with_context(e, what) from e
        if limit is None:
            raise IntegrityViolation(f"{what}: metric {metric!r} needs a limit, e.g. '<= 25 ms'")
        try:
            # the limit must fit each loop's plant units (docs/metrics.md, units)
            lim = parse_limit_for(limit, metric, unit,
                                  list(plant_units(sorted(set(loops or ())))))
        except LedgerError as e:
            raise with_context(e, what) from e
        comparator, limit_value, limit_text = lim.comparator, lim.value, lim.text
        if isinstance(settings.get("move"), str):
            # a move amplitude with a unit must fit each loop's plant output unit
            from .units import quantity_in

            for loop_name, _, ou in plant_units(sorted(set(loops or ()))):
                try:
                    quantity_in(settings["move"], ou)
                except LedgerError as e:
                    raise with_context(e, f"{what} on loop {loop_name!r}") from e
        # a metric without loops is allowed (coverage reports it)
    elif limit:
        raise IntegrityViolation(f"{what}: a limit needs a metric")
    elif settings:
        raise IntegrityViolation(f"{what}: settings need a metric")
    parent_keys = sorted(set(parents or ()))
    if key in parent_keys:
        raise IntegrityViolation(f"{what}: a requirement cannot derive from itself")
    return dict(
        title=title.strip(), statement=statement.strip(), rationale=(rationale or "").strip(),
        method=method, status=status, metric=metric or None,
        settings_json=json.dumps({**settings, **claim}, sort_keys=True), comparator=comparator,
        limit_value=limit_value, limit_text=limit_text, parents=parent_keys,
        loops=sorted(set(loops or ())),
    )


def requirement_hash(fields: Mapping) -> str:
    """Content hash of a requirement version (its statement, limit and trace by key/name)."""
    return sha256_of({k: fields[k] for k in (
        "title", "statement", "rationale", "method", "status", "metric", "settings_json",
        "comparator", "limit_value", "limit_text", "parents", "loops")})


def revision_hash(*, loop: str, label: str, controller_canonical: str, parent_hash: str | None,
                  rationale: str, author: str, created_at_iso: str, discretization: str = "",
                  number_format: str = "", verified_text: str = "",
                  prefilter_canonical: str = "", anti_windup: str = "none",
                  anti_windup_gain: float | None = None) -> str:
    """Content hash of a revision (``created_at_iso``: ``datetime.isoformat`` in UTC).  The
    digital fields (docs/digital.md) and the revision's prefilter and anti-windup
    (:func:`design_hash_part`) enter only when set, so revisions without them keep the hash
    they had before those fields existed."""
    payload = {
        "loop": loop, "label": label, "controller": controller_canonical,
        "parent": parent_hash, "rationale": rationale, "author": author,
        "created_at": created_at_iso,
    }
    for key, value in (("discretization", discretization), ("number_format", number_format),
                       ("verified", verified_text)):
        if value:
            payload[key] = value
    payload.update(design_hash_part(prefilter_canonical, anti_windup, anti_windup_gain))
    return sha256_of(payload)


#: Anti-windup schemes a revision may carry (docs/metrics.md, large moves).
ANTI_WINDUP = ("none", "clamping", "back-calculation")


def design_hash_part(prefilter_canonical: str = "", anti_windup: str = "none",
                     anti_windup_gain: float | None = None) -> dict:
    """The part of a revision's hashed content its prefilter and anti-windup add (empty for
    the defaults)."""
    out: dict = {}
    if prefilter_canonical:
        out["prefilter"] = prefilter_canonical
    if anti_windup and anti_windup != "none":
        out["anti_windup"] = anti_windup
        if anti_windup_gain is not None:
            out["anti_windup_gain"] = float(anti_windup_gain)
    return out


def design_fields(prefilter: str | None, anti_windup: str | None,
                  anti_windup_gain, *, what: str, sample_time: float | None) -> dict:
    """The stored fields of a revision's prefilter and anti-windup, checked: the prefilter is
    model text (empty: the loop's own prefilter applies); ``back-calculation`` needs a gain
    > 0 (1/s), the other schemes take none."""
    prefilter = (prefilter or "").strip()
    canonical = ""
    if prefilter:
        canonical = model_canonical(prefilter, what=f"{what}: prefilter",
                                    sample_time=sample_time)
    aw = (anti_windup or "none").strip()
    if aw not in ANTI_WINDUP:
        raise IntegrityViolation(f"{what}: anti-windup {aw!r} is not one of "
                                 f"{', '.join(ANTI_WINDUP)}")
    gain = None
    if aw == "back-calculation":
        if anti_windup_gain is None:
            raise ModelError(f"{what}: back-calculation anti-windup needs a gain (1/s), "
                             "e.g. anti_windup_gain = 50")
        gain = finite(f"{what}: anti_windup_gain", anti_windup_gain, minimum=0, strict=True)
    elif anti_windup_gain is not None:
        raise ModelError(f"{what}: anti_windup_gain is only for back-calculation "
                         f"(anti-windup is {aw!r})")
    return {"prefilter_text": prefilter, "prefilter_canonical": canonical,
            "anti_windup": aw, "anti_windup_gain": gain}
