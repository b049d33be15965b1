"""Planning: what must be computed to bring a revision up to date (read side, one snapshot).

A plan holds everything the computation needs as plain data (texts, numbers, ids), so it can
be sent to a worker process and computed without a session.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Iterable

from ..store.session import Session

from ..hashing import sha256_of
from ..store import loops as loops_db
from ..store import plants as plants_db
from ..store import requirements as req_db
from ..store import results as results_db
from ..store import revisions as rev_db
from ..store.models import Loop, PlantVersion, Revision
from ..validate import design_hash_part

__all__ = ["Check", "RevisionPlan", "engine_version", "applicable_checks", "plan_revision",
           "plan_head", "plan_loops", "plan_controller", "design_of"]


def design_of(row) -> dict:
    """The prefilter and anti-windup of a revision row (or the stored fields of a revision not
    yet recorded, :func:`~ledger.validate.design_fields`) as a plan carries them."""
    get = row.get if isinstance(row, dict) else (lambda k: getattr(row, k))
    return {"prefilter_text": get("prefilter_text") or "",
            "prefilter_canonical": get("prefilter_canonical") or "",
            "anti_windup": get("anti_windup") or "none",
            "anti_windup_gain": get("anti_windup_gain")}


def engine_version() -> str:
    from ..engine.results import engine_version as current

    return current()


@dataclass(frozen=True)
class Check:
    """One requirement version to judge."""

    version_id: int
    key: str
    version: int
    status: str
    metric: str
    settings: dict          # complete (defaults filled in)
    comparator: str
    limit_value: float
    limit_text: str
    unit: str
    problem: str = ""       # the limit does not fit the plant's units (judged as an error)
    #: the yield claim (``ledger.yieldbound``): judged on the bound over the random samples
    yield_target: float | None = None
    confidence: float | None = None


@dataclass
class RevisionPlan:
    loop: str
    loop_id: int
    label: str | None
    revision_id: int | None
    controller_text: str
    controller_canonical: str
    loop_form: dict
    plant_version_id: int
    plant_version: int
    plant_hash: str
    plant_spec: dict
    checks: list[Check] = field(default_factory=list)
    #: the digital form (docs/digital.md): the design as entered, its method and number
    #: format; ``controller_text`` is then the discrete controller verified
    design_text: str = ""
    discretization: str = ""
    number_format: str = ""
    #: the revision's own prefilter and anti-windup (:func:`design_of`; empty: none)
    design: dict = field(default_factory=dict)

    def metric_key(self, metric: str, settings: dict) -> str:
        """Content hash of everything a family's metric values depend on."""
        payload = {
            "engine": engine_version(), "plant": self.plant_hash,
            "controller": self.controller_canonical, "loop": self.loop_form,
            "metric": metric, "settings": _jsonable_settings(settings),
        }
        if self.discretization or self.number_format:  # absent before digital forms existed
            payload["digital"] = {"design": self.design_text, "method": self.discretization,
                                  "format": self.number_format}
        part = design_hash_part(self.design.get("prefilter_canonical", ""),
                                self.design.get("anti_windup", "none"),
                                self.design.get("anti_windup_gain"))
        if part:  # the revision's prefilter and anti-windup, only when set
            payload["design"] = part
        return sha256_of(payload)

    def keys(self) -> list[str]:
        """The metric key of every check, in order."""
        return [self.metric_key(c.metric, c.settings) for c in self.checks]


def _jsonable_settings(settings: dict) -> dict:
    return {k: list(v) if isinstance(v, tuple) else v for k, v in sorted(settings.items())}


def applicable_checks(s: Session, loop_id: int, keys: Iterable[str] | None = None) -> list[Check]:
    """Latest, non-retired, metric-bearing requirement versions that apply to the loop."""
    from ..catalogue import metric_unit
    from ..engine.metrics import resolve_settings
    from ..errors import LedgerError
    from ..units import PLANT_UNIT_METRICS, parse_limit_for
    from ..yieldbound import split_yield

    loop = s.get(Loop, loop_id)
    pv = plants_db.latest_version(s, loop.plant_id) if loop is not None else None
    iu, ou = (pv.input_unit, pv.output_unit) if pv is not None else ("", "")
    out = []
    for key, v in req_db.applicable_versions(s, loop_id, keys):
        unit, limit_value, problem = metric_unit(v.metric), v.limit_value, ""
        if v.metric in PLANT_UNIT_METRICS and (iu or ou):
            # the limit read against this plant's declared units (docs/metrics.md, units)
            try:
                lim = parse_limit_for(v.limit_text, v.metric, unit, [(loop.name, iu, ou)])
                unit, limit_value = lim.unit, lim.value
            except LedgerError as e:
                problem = str(e)
        settings, target, confidence = split_yield(json.loads(v.settings_json))
        if isinstance(settings.get("move"), str):
            # a move amplitude with a unit, read in this plant's output unit (docs/metrics.md)
            from ..units import quantity_in

            try:
                settings["move"] = quantity_in(settings["move"], ou)
            except LedgerError as e:
                problem = problem or str(e)
                settings.pop("move")
        if "move" not in settings and v.metric.startswith("move_"):
            settings["move"] = 1.0  # judged as an error (problem) without computing
        out.append(Check(
            version_id=v.id, key=key, version=v.number, status=v.status, metric=v.metric,
            settings=resolve_settings(v.metric, settings),
            comparator=v.comparator, limit_value=limit_value, limit_text=v.limit_text,
            unit=unit, problem=problem, yield_target=target, confidence=confidence,
        ))
    return out


def plan_head(loop: Loop, pv: PlantVersion, revision: Revision | None,
              controller_text: str | None = None,
              controller_canonical: str | None = None, form=None,
              design: dict | None = None) -> RevisionPlan:
    """A plan without checks for ``revision`` (or a controller with its digital ``form``,
    :class:`ledger.digital.DigitalForm`, and the stored fields of its prefilter and anti-windup
    ``design``) against plant version ``pv``."""
    if revision is not None:
        entered, canonical = revision.controller_text, revision.controller_canonical
        method, fmt = revision.discretization or "", revision.number_format or ""
        verified = revision.verified_text or ""
    else:
        entered, canonical = controller_text, controller_canonical
        method = form.discretization if form else ""
        fmt = form.number_format if form else ""
        verified = form.verified_text if form else ""
    if verified:
        from ..validate import model_canonical

        canonical = model_canonical(verified, what="verified controller",
                                    sample_time=loop.sample_time)
    return RevisionPlan(
        design=design_of(revision) if revision is not None else design_of(design or {}),
        loop=loop.name, loop_id=loop.id, label=revision.label if revision else None,
        revision_id=revision.id if revision else None,
        controller_text=verified or entered, controller_canonical=canonical,
        design_text=entered, discretization=method, number_format=fmt,
        loop_form=loops_db.loop_form(loop), plant_version_id=pv.id, plant_version=pv.number,
        plant_hash=pv.content_hash,
        plant_spec={"model": pv.model_text, "params": json.loads(pv.parameters_json),
                    "fidelity": json.loads(pv.fidelity_json), "samples": pv.samples,
                    "measured": json.loads(pv.measured_json or "{}"),
                    "seed": pv.seed, "sample_time": pv.sample_time},
    )


def plan_revision(s: Session, loop: Loop, *, revision: Revision | None = None,
                  controller_text: str | None = None, controller_canonical: str | None = None,
                  keys: Iterable[str] | None = None, missing_only: bool = True,
                  form=None, design: dict | None = None) -> RevisionPlan:
    """What must be computed to bring ``revision`` (or a not-yet-recorded controller) up to
    date against the latest requirement and plant versions."""
    pv = plants_db.latest_version(s, loop.plant_id)
    plan = plan_head(loop, pv, revision, controller_text, controller_canonical, form,
                     design)
    checks = applicable_checks(s, loop.id, keys)
    if revision is not None and missing_only:
        done = results_db.judged_version_ids(s, revision.id, pv.id)
        checks = [c for c in checks if c.version_id not in done]
    plan.checks = checks
    return plan


def plan_loops(s: Session, loop: str | None = None, *, label: str | None = None,
               tips_only: bool = False, keys: Iterable[str] | None = None
               ) -> list[tuple[RevisionPlan, dict]]:
    """(plan, cached payloads) of every revision with something missing: all revisions, the
    tips only, or revision ``label``, of one loop or all of them."""
    plans = []
    for lp in loops_db.loop_rows(s, loop):
        if label is not None:
            revs = [rev_db.revision_row(s, lp, label)]
        elif tips_only:
            tip = rev_db.tip_row(s, lp)
            revs = [tip] if tip is not None else []
        else:
            revs = rev_db.revision_rows(s, lp)
        for rev in revs:
            plan = plan_revision(s, lp, revision=rev, keys=keys)
            if plan.checks:
                plans.append((plan, results_db.load_cached(s, plan.keys())))
    return plans


def plan_controller(s: Session, loop: str, controller: str, *, discretization: str = "",
                    number_format: str = "", prefilter: str = "", anti_windup: str = "none",
                    anti_windup_gain: float | None = None) -> tuple[RevisionPlan, dict]:
    """(plan, cached payloads) for a controller not recorded yet on ``loop`` (with its
    digital form: method and number format, docs/digital.md; and its own prefilter and
    anti-windup, checked here)."""
    from ..digital import digital_form
    from ..validate import design_fields, model_canonical

    lp = loops_db.loop_row(s, loop)
    what = f"revision of loop {loop!r}: controller"
    canonical = model_canonical(controller, what=what, sample_time=lp.sample_time)
    form = digital_form(controller, lp.sample_time, discretization=discretization,
                        number_format=number_format, what=what)
    design = design_fields(prefilter, anti_windup, anti_windup_gain,
                           what=f"revision of loop {loop!r}", sample_time=lp.sample_time)
    plan = plan_revision(s, lp, controller_text=controller, controller_canonical=canonical,
                         form=form, design=design)
    return plan, results_db.load_cached(s, plan.keys())
