"""Plain, frozen views of ledger records, returned by the API (no live ORM objects escape)."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from datetime import datetime
from typing import Any

__all__ = [
    "PlantInfo",
    "LoopInfo",
    "RequirementInfo",
    "RevisionInfo",
    "ResultInfo",
    "LineageNode",
    "lineage_forest",
    "BaselineColumn",
    "FrozenCell",
    "SignoffInfo",
    "BaselineInfo",
    "WaiverInfo",
    "to_jsonable",
]


@dataclass(frozen=True)
class PlantInfo:
    name: str
    version: int
    model: str
    canonical: str
    params: dict
    fidelity: dict
    samples: int
    seed: int
    sample_time: float | None
    input_unit: str
    output_unit: str
    description: str
    note: str
    author: str
    content_hash: str
    created_at: datetime
    versions: int = 1
    #: measurement name -> stored measurement (``MeasuredResponse.to_json`` form)
    measured: dict = field(default_factory=dict)


@dataclass(frozen=True)
class LoopInfo:
    name: str
    plant: str
    kind: str
    description: str
    sensor: str
    prefilter: str
    input_delay: float
    output_delay: float
    sample_time: float | None
    computation_delay: int
    actuator_limit: float | None
    created_at: datetime
    revisions: int = 0
    tip: str | None = None
    rate_limit: float | None = None


@dataclass(frozen=True)
class RequirementInfo:
    key: str
    version: int
    title: str
    statement: str
    rationale: str
    method: str
    status: str
    metric: str | None
    settings: dict
    comparator: str | None
    limit_value: float | None
    limit_text: str
    unit: str
    parents: tuple[str, ...]
    loops: tuple[str, ...]
    author: str
    note: str
    content_hash: str
    created_at: datetime
    latest_version: int = 1
    #: the yield claim (docs/history.md, yield with confidence): target fraction or ``None``,
    #: and the confidence of the bound (``None``: the default, 95 %)
    yield_target: float | None = None
    confidence: float | None = None


@dataclass(frozen=True)
class RevisionInfo:
    loop: str
    label: str
    seq: int
    parent: str | None
    author: str
    rationale: str
    controller: str
    content_hash: str
    created_at: datetime
    children: tuple[str, ...] = ()
    #: digital controllers (docs/digital.md): method, number format, and the discrete
    #: controller verified when it differs from ``controller`` (all "" otherwise)
    discretization: str = ""
    number_format: str = ""
    verified: str = ""
    #: the revision's own prefilter (model text; "" = the loop's prefilter applies)
    prefilter: str = ""
    anti_windup: str = "none"
    anti_windup_gain: float | None = None


@dataclass(frozen=True)
class ResultInfo:
    loop: str
    revision: str
    requirement: str
    requirement_version: int
    plant_version: int
    verdict: str
    value: float | None
    unit: str
    limit_text: str
    headroom: float | None
    headroom_fraction: float | None
    worst_variant: str
    pass_fraction: float | None
    variants: int
    reason: str
    engine_version: str
    created_at: datetime
    stale: bool = False
    #: yield with confidence (``ledger.yieldbound.yield_fields``): random samples in the
    #: family and how many pass (``None``: no random samples, or not known), the one-sided
    #: Clopper-Pearson lower bound on the pass probability at ``confidence``, the
    #: requirement's yield target and the all-passing samples its claim needs
    samples: int | None = None
    sample_passes: int | None = None
    confidence: float = 0.95
    yield_bound: float | None = None
    yield_target: float | None = None
    samples_needed: int | None = None


@dataclass(frozen=True)
class LineageNode:
    revision: RevisionInfo
    children: tuple["LineageNode", ...] = field(default_factory=tuple)


def lineage_forest(revs: list[RevisionInfo]) -> list[LineageNode]:
    """The revision tree of one loop's revisions (in recorded order): a list of roots,
    children in recorded order."""
    # children are always recorded after their parent: build bottom-up without recursion
    # (a loop may carry thousands of revisions in one chain)
    built: dict[str, LineageNode] = {}
    for r in reversed(revs):
        built[r.label] = LineageNode(r, tuple(built[c] for c in r.children))
    return [built[r.label] for r in revs if r.parent is None]


# -- baselines and sign-offs (ledger.signoff) ----------------------------------------------
@dataclass(frozen=True)
class BaselineColumn:
    """A frozen revision and the plant version its results are judged against."""

    loop: str
    revision: str
    revision_hash: str
    plant: str
    plant_version: int
    plant_hash: str


@dataclass(frozen=True)
class FrozenCell:
    """A frozen matrix cell.  ``value`` and ``headroom`` are in the metric's unit (may be
    ``math.inf``; ``None`` when there is no value)."""

    requirement: str
    requirement_version: int
    requirement_hash: str
    limit: str
    loop: str
    revision: str
    revision_hash: str
    plant: str
    plant_version: int
    plant_hash: str
    verdict: str
    value: float | None
    headroom: float | None
    engine_version: str


@dataclass(frozen=True)
class SignoffInfo:
    baseline: str
    name: str
    role: str
    statement: str
    author: str
    matrix_hash: str
    chain_head: str
    signed_at: datetime
    #: cells accepted explicitly (``requirement, loop, revision, verdict``), and the waivers
    #: that covered cells when it was signed (``waiver`` id, the cell, reason, approver,
    #: role, expiry, condition); empty for sign-offs made before waivers existed
    accepted: tuple = ()
    waivers: tuple = ()


@dataclass(frozen=True)
class BaselineInfo:
    name: str
    note: str
    author: str
    created_at: datetime
    matrix_hash: str
    supersedes: str | None
    superseded_by: str | None
    columns: tuple[BaselineColumn, ...]
    cells: tuple[FrozenCell, ...]
    signoffs: tuple[SignoffInfo, ...]

    @property
    def signed(self) -> bool:
        return bool(self.signoffs)

    def counts(self) -> dict[str, int]:
        from .judge import count_verdicts

        return count_verdicts(self.cells, ())



@dataclass(frozen=True)
class WaiverInfo:
    """A waiver: a failing (or error) verdict of ``requirement`` accepted on one revision
    (``loop``/``revision``) or on every revision baseline ``baseline`` freezes.

    ``expires_on`` is the last day it counts (ISO date) or ``None``; ``condition`` is free
    text ("until the next hardware build") that a person judges.  ``withdrawn_at`` (with who
    and why) is set once a withdrawal is recorded."""

    id: int
    requirement: str
    loop: str | None
    revision: str | None
    baseline: str | None
    reason: str
    approver: str
    role: str
    expires_on: str | None
    condition: str
    author: str
    created_at: datetime
    record_hash: str = ""
    withdrawn_at: datetime | None = None
    withdrawn_by: str = ""
    withdrawn_role: str = ""
    withdrawal_reason: str = ""
    #: ``loop/label`` of each revision it covers (the one revision, or every revision the
    #: baseline freezes)
    covers: tuple = ()

    @property
    def scope(self) -> str:
        """``loop/label`` or ``baseline NAME``."""
        return f"{self.loop}/{self.revision}" if self.baseline is None else \
            f"baseline {self.baseline}"

    def status(self, as_of) -> str:
        """``live``, ``expired`` (``expires_on`` before ``as_of``, a date) or ``withdrawn``."""
        if self.withdrawn_at is not None:
            return "withdrawn"
        if self.expires_on is not None and self.expires_on < as_of.isoformat():
            return "expired"
        return "live"

    def live(self, as_of) -> bool:
        return self.status(as_of) == "live"

    def until(self) -> str:
        """Expiry and condition in words (``-`` when neither)."""
        parts = ([f"until {self.expires_on}"] if self.expires_on else []) + \
            ([self.condition] if self.condition else [])
        return "; ".join(parts) or "-"


def to_jsonable(obj: Any) -> Any:
    """Dataclasses, datetimes and infinities to JSON-friendly values."""
    import math

    if hasattr(obj, "__dataclass_fields__"):
        return {k: to_jsonable(v) for k, v in asdict(obj).items()}
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, datetime):
        return obj.isoformat()
    if isinstance(obj, float) and not math.isfinite(obj):
        return "inf" if obj > 0 else ("-inf" if obj < 0 else None)
    return obj
