"""Dry runs: verify candidate controllers over the whole plant family and compare them with a
recorded revision, recording nothing.

``Ledger.try_revision`` plans each candidate exactly as ``add_revision`` would (latest
requirement and plant versions, one read snapshot), computes what the ledger's metric-value
cache and the dry-run cache (:mod:`.tried`) do not hold, judges every applicable requirement and
classifies the results against the reference revision (the loop's tip, or ``against``) with
the regression classes of :mod:`ledger.history.diff`.  Nothing is written to the ledger; the
computed values go to :mod:`.tried`, so recording a tried candidate afterwards computes nothing.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Sequence

from ..errors import LedgerError, UsageError, with_context
from ..history.diff import Change, _annotate, _check_threshold, classify
from ..records import ResultInfo, RevisionInfo
from ..units import resolve_unit
from . import tried
from .compute import compute_plan, judge_payload, validate_controller
from .plan import engine_version, plan_controller

__all__ = ["Candidate", "TryReport", "try_revision", "candidate_name"]


def candidate_name(i: int) -> str:
    """``A``, ``B``, ... ``Z``, ``AA``... : how candidate ``i`` (from 0) is named in tables."""
    name = ""
    i += 1
    while i:
        i, r = divmod(i - 1, 26)
        name = chr(65 + r) + name
    return name


@dataclass(frozen=True)
class Candidate:
    """One tried controller.

    Attributes
    ----------
    name : str
        ``A``, ``B``, ... in the order given.
    controller : str
        The controller text as given.
    results : tuple of ResultInfo
        One per applicable requirement, as ``results`` would show after recording it (its
        ``revision`` is ``try:<name>``).
    changes : tuple of Change
        Against the reference revision (every result ``new`` when there is none).
    computed : int
        (metric, settings) requests the engine evaluated for it (0 when all were cached).
    threshold : float
        The headroom fraction the changes were classified with.
    """

    name: str
    controller: str
    results: tuple[ResultInfo, ...]
    changes: tuple[Change, ...]
    computed: int
    threshold: float = 0.25

    @property
    def broken(self) -> tuple[Change, ...]:
        """Requirements that pass on the reference and do not pass on this candidate."""
        return tuple(c for c in self.changes if c.kind == "broke")

    @property
    def regressions(self) -> tuple[Change, ...]:
        """``broke`` and ``eroded`` changes."""
        return tuple(c for c in self.changes if c.is_regression)

    def counts(self) -> dict[str, int]:
        """Number of requirements per change class (classes with none left out)."""
        out: dict[str, int] = {}
        for c in self.changes:
            out[c.kind] = out.get(c.kind, 0) + 1
        return out

    @property
    def breaks_nothing(self) -> bool:
        """No requirement that passes on the reference fails or errs on this candidate."""
        return not self.broken


@dataclass(frozen=True)
class TryReport:
    """What :func:`try_revision` found: the reference revision (``None`` when the loop has
    none) and every candidate, in the order given."""

    loop: str
    against: RevisionInfo | None
    threshold: float
    candidates: tuple[Candidate, ...]

    @property
    def safe(self) -> tuple[str, ...]:
        """Names of the candidates that break nothing."""
        return tuple(c.name for c in self.candidates if c.breaks_nothing)


def _results(lg, plan, payloads: dict, units: tuple[str, str], label: str) -> list[ResultInfo]:
    from ..catalogue import metric_unit
    from ..yieldbound import yield_fields

    now = datetime.now(timezone.utc)
    out = []
    for c in plan.checks:
        jd = judge_payload(c, payloads[plan.metric_key(c.metric, c.settings)])
        out.append(ResultInfo(
            loop=plan.loop, revision=label, requirement=c.key, requirement_version=c.version,
            plant_version=plan.plant_version, verdict=jd.verdict, value=jd.value,
            unit=resolve_unit(c.metric, metric_unit(c.metric), *units), limit_text=c.limit_text,
            headroom=jd.headroom, headroom_fraction=jd.headroom_fraction,
            worst_variant=jd.worst_variant, pass_fraction=jd.pass_fraction,
            variants=jd.variants, reason=jd.reason, engine_version=engine_version(),
            created_at=now, **yield_fields(jd.samples, jd.sample_passes, c.yield_target,
                                           c.confidence)))
    return out


def try_revision(lg, loop: str, controllers: str | Sequence[str], *,
                 against: str | None = None, threshold: float = 0.25) -> TryReport:
    """:meth:`ledger.api.Ledger.try_revision` (see there)."""
    if isinstance(controllers, str):
        controllers = [controllers]
    controllers = list(controllers)
    if not controllers:
        raise UsageError("give at least one candidate controller to try")
    threshold = _check_threshold(threshold)
    info = lg.loop(loop)
    pl = lg.plant(info.plant)
    units = (pl.input_unit, pl.output_unit)
    ref = None
    revs = lg.revisions(loop)
    if against is not None or revs:
        ref = lg.revision(loop, against)
    ref_results = lg.results(loop, ref.label) if ref is not None else []
    reqs = {r.key: r for r in lg.requirements()}
    out = []
    for i, text in enumerate(controllers):
        name = candidate_name(i)
        with lg.store.reading() as s:
            plan, cached = plan_controller(s, loop, text)
        try:
            validate_controller(plan)
        except LedgerError as e:
            raise with_context(e, f"candidate {name} for loop {loop!r}") from e
        keys = plan.keys()
        kept = tried.recall(k for k in keys if k not in cached)
        payloads, n = compute_plan(plan, {**cached, **kept})
        lg.kernel_requests += n
        fresh = {k: v for k, v in payloads.items() if k not in cached}
        if fresh:
            tried.remember(fresh)
        res = _results(lg, plan, payloads, units, f"try:{name}")
        changes = classify(ref_results, res, threshold)
        changes = _annotate(changes, reqs, loop, ref.label if ref else None, f"try:{name}")
        out.append(Candidate(name, text, tuple(res), changes, n, threshold))
    return TryReport(loop, ref, threshold, tuple(out))
